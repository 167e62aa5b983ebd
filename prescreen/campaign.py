"""The persistent campaign store: what was read, checked, proposed, computed and learned.

A campaign is a folder::

    my-campaign/
        campaign.sqlite        candidates, flags, duplicates, results, rounds, proposals, models
        features/<schema>.parquet   cached descriptors, one file per feature-schema version
        rounds/round-NNN/      ready-to-run structures of each proposed batch
        models/                trained models (LightGBM text + JSON metadata)
        labels/                the built-in labeller's settings.json and checkpointed records
        z2.csv                 Z2 invariants of the hits (``prescreen z2``)

The database uses SQLite's write-ahead log and one transaction per user action, so a
process killed in the middle of an ingest leaves the store exactly as it was before.
Every action can be repeated: adding the same candidates or the same results twice
changes nothing.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import sqlite3
import zlib
from collections.abc import Callable, Iterable, Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Literal

from prescreen import SPILLAGE_THRESHOLD, __version__
from prescreen.candidate import Candidate
from prescreen.errors import CampaignError, InputError, Rejection
from prescreen.hazards import hazard_text
from prescreen.io.atomic import replacing

if TYPE_CHECKING:  # pragma: no cover
    import pandas as pd
    from pymatgen.core import Structure

    from prescreen.physics.dft import LabelSettings

__all__ = [
    "Campaign",
    "CandidateIngestReport",
    "ResultIngestReport",
    "CampaignStatus",
    "ConflictPolicy",
    "DB_NAME",
]

DB_NAME = "campaign.sqlite"
#: Folder of the built-in labeller's checkpoints and settings (``prescreen label``).
LABELS_DIR = "labels"
#: Bump when the table layout changes; older stores are then refused with a clear error.
STORE_FORMAT = 1

ConflictPolicy = Literal["error", "keep", "replace"]
_POLICIES = ("error", "keep", "replace")

_SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS candidates (
    id TEXT PRIMARY KEY,
    formula TEXT NOT NULL,
    reduced_formula TEXT NOT NULL,
    chemsys TEXT NOT NULL,
    source TEXT NOT NULL,
    n_atoms INTEGER,
    structure BLOB,
    layer_status TEXT NOT NULL,
    thickness_A REAL,
    vacuum_A REAL,
    layer_reason TEXT,
    duplicate_of TEXT,
    hazard TEXT NOT NULL DEFAULT '',
    meta TEXT NOT NULL DEFAULT '{}',
    added_at TEXT NOT NULL,
    seq INTEGER NOT NULL
);
CREATE INDEX IF NOT EXISTS candidates_reduced ON candidates(reduced_formula);
CREATE TABLE IF NOT EXISTS rejections (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,
    kind TEXT NOT NULL,
    path TEXT NOT NULL,
    line TEXT,
    value TEXT NOT NULL,
    reason TEXT NOT NULL,
    at TEXT NOT NULL,
    superseded_at TEXT,
    UNIQUE (kind, path, line, value, reason)
);
CREATE TABLE IF NOT EXISTS results (
    seq INTEGER PRIMARY KEY AUTOINCREMENT,
    candidate_id TEXT NOT NULL REFERENCES candidates(id),
    spillage REAL NOT NULL,
    functional TEXT, code TEXT, kmesh TEXT, core_hours REAL, notes TEXT,
    source TEXT NOT NULL,
    ingested_at TEXT NOT NULL,
    active INTEGER NOT NULL DEFAULT 1,
    gap_soc_eV REAL,
    direct_gap_soc_eV REAL
);
CREATE INDEX IF NOT EXISTS results_candidate ON results(candidate_id, active);
CREATE TABLE IF NOT EXISTS rounds (
    number INTEGER PRIMARY KEY,
    created_at TEXT NOT NULL,
    strategy TEXT NOT NULL,
    budget_core_hours REAL NOT NULL,
    seed INTEGER,
    model_version TEXT,
    settings TEXT NOT NULL DEFAULT '{}'
);
CREATE TABLE IF NOT EXISTS proposals (
    round INTEGER NOT NULL REFERENCES rounds(number),
    candidate_id TEXT NOT NULL REFERENCES candidates(id),
    rank INTEGER NOT NULL,
    probability REAL, uncertainty REAL, cost_core_hours REAL,
    reason TEXT,
    status TEXT NOT NULL DEFAULT 'pending',
    PRIMARY KEY (round, candidate_id)
);
CREATE TABLE IF NOT EXISTS models (
    version TEXT PRIMARY KEY,
    path TEXT NOT NULL,
    created_at TEXT NOT NULL,
    feature_schema TEXT NOT NULL,
    training_rows INTEGER,
    metrics TEXT NOT NULL DEFAULT '{}',
    settings TEXT NOT NULL DEFAULT '{}'
);
"""


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def _pack_structure(structure: Structure | None) -> bytes | None:
    if structure is None:
        return None
    return zlib.compress(json.dumps(structure.as_dict(), separators=(",", ":")).encode())


def _unpack_structure(blob: bytes | None) -> Structure | None:
    if blob is None:
        return None
    from pymatgen.core import Structure

    return Structure.from_dict(json.loads(zlib.decompress(blob)))


@dataclass
class CandidateIngestReport:
    """What one call of :meth:`Campaign.add_candidates` did."""

    added: int = 0
    already_present: int = 0
    duplicates: int = 0
    layer_counts: dict[str, int] = field(default_factory=dict)
    rejections: list[Rejection] = field(default_factory=list)


@dataclass
class ResultIngestReport:
    """What one call of :meth:`Campaign.ingest_results` did."""

    added: int = 0
    unchanged: int = 0
    replaced: int = 0
    kept_existing: int = 0
    #: Stored results without a band gap (indirect or direct) that a row with the same
    #: spillage completed.
    gaps_added: int = 0
    rejections: list[Rejection] = field(default_factory=list)


@dataclass(frozen=True)
class CampaignStatus:
    """Counts that describe a campaign at a glance."""

    name: str
    path: str
    candidates: int
    with_structure: int
    formula_only: int
    monolayers: int
    not_2d: int
    ambiguous: int
    duplicates: int
    flagged_hazard: int
    labelled: int
    positives: int
    threshold: float
    rejections: int
    rounds: int
    pending: int
    models: int

    def as_dict(self) -> dict[str, Any]:
        from dataclasses import asdict

        return asdict(self)


class Campaign:
    """A campaign folder on disk. Open with :meth:`create` or :meth:`open`.

    Parameters
    ----------
    path
        The campaign folder.
    """

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        db = self.path / DB_NAME
        if not db.is_file():
            raise CampaignError(
                f"{self.path}: not a campaign folder (no {DB_NAME}); "
                "create one with `prescreen create`"
            )
        try:
            self._conn = self._connect(db)
            fmt = self.meta("store_format")
        except sqlite3.DatabaseError as exc:
            raise CampaignError(f"{db}: not a readable campaign store ({exc}); restore it "
                                "from a backup or create a new campaign") from exc
        if fmt is None or int(fmt) != STORE_FORMAT:
            raise CampaignError(
                f"{db}: store format {fmt!r} is not the supported format {STORE_FORMAT}"
            )
        self._upgrade()

    def _upgrade(self) -> None:
        """Add columns that later releases of the same store format introduced."""
        added = [("models", "settings", "TEXT NOT NULL DEFAULT '{}'"),
                 ("results", "gap_soc_eV", "REAL"),
                 ("results", "direct_gap_soc_eV", "REAL"),
                 ("rejections", "superseded_at", "TEXT")]
        for table, column, kind in added:
            columns = {row[1] for row in self._conn.execute(f"PRAGMA table_info({table})")}
            if column not in columns:
                try:
                    with self._transaction() as conn:
                        conn.execute(f"ALTER TABLE {table} ADD COLUMN {column} {kind}")
                except sqlite3.OperationalError as exc:
                    # another process opened the same old store at the same moment
                    if "duplicate column name" not in str(exc):
                        raise

    # ------------------------------------------------------------------ opening
    @staticmethod
    def _connect(db: Path) -> sqlite3.Connection:
        conn = sqlite3.connect(db, isolation_level=None, timeout=30.0)
        conn.execute("PRAGMA journal_mode=WAL")
        conn.execute("PRAGMA synchronous=NORMAL")
        conn.execute("PRAGMA foreign_keys=ON")
        return conn

    @classmethod
    def create(
        cls,
        path: str | Path,
        *,
        name: str | None = None,
        threshold: float = SPILLAGE_THRESHOLD,
        exist_ok: bool = False,
    ) -> Campaign:
        """Create an empty campaign folder (or open it when ``exist_ok``)."""
        path = Path(path)
        db = path / DB_NAME
        if db.exists():
            if exist_ok:
                return cls(path)
            raise CampaignError(f"{path}: a campaign already exists here")
        if path.exists() and not path.is_dir():
            raise CampaignError(f"{path}: exists and is not a folder")
        if not (0 < threshold < float("inf")):
            raise InputError("spillage threshold must be a positive number", value=threshold,
                             expected="a finite number > 0 (0.5 by common practice)")
        path.mkdir(parents=True, exist_ok=True)
        conn = cls._connect(db)
        with conn:
            conn.execute("BEGIN")
            conn.executescript(_SCHEMA.replace("BEGIN", ""))
            for key, value in {
                "store_format": str(STORE_FORMAT),
                "name": name or path.name,
                "threshold": repr(float(threshold)),
                "created_at": _now(),
                "created_by": f"prescreen {__version__}",
            }.items():
                conn.execute("INSERT OR REPLACE INTO meta VALUES (?, ?)", (key, value))
        conn.close()
        return cls(path)

    @classmethod
    def open(cls, path: str | Path) -> Campaign:
        """Open an existing campaign folder."""
        return cls(path)

    def close(self) -> None:
        self._conn.close()

    def __enter__(self) -> Campaign:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    @contextmanager
    def _transaction(self) -> Iterator[sqlite3.Connection]:
        """One all-or-nothing write: committed on success, rolled back otherwise."""
        self._conn.execute("BEGIN IMMEDIATE")
        try:
            yield self._conn
        except BaseException:
            self._conn.execute("ROLLBACK")
            raise
        else:
            self._conn.execute("COMMIT")

    # ------------------------------------------------------------------ meta
    def meta(self, key: str) -> str | None:
        row = self._conn.execute("SELECT value FROM meta WHERE key=?", (key,)).fetchone()
        return None if row is None else row[0]

    @property
    def name(self) -> str:
        return self.meta("name") or self.path.name

    @property
    def threshold(self) -> float:
        return float(self.meta("threshold") or SPILLAGE_THRESHOLD)

    @property
    def labels_dir(self) -> Path:
        """Checkpoint folder of the built-in labeller (``prescreen label``)."""
        return self.path / LABELS_DIR

    def label_settings(self, **asked: Any) -> LabelSettings:
        """The level of theory of this campaign's built-in labeller.

        The first ``prescreen label`` run fixes it in ``labels/settings.json``; every later
        calculation of the campaign (spillage, Z2) uses the same, so labels stay comparable
        and a checkpointed run resumes. Before that it is the defaults of
        :class:`~prescreen.physics.dft.LabelSettings` with ``asked`` applied.

        Parameters
        ----------
        asked
            :class:`~prescreen.physics.dft.LabelSettings` fields to set; None means "not
            asked". Once the settings are fixed, a value that differs from them is an error.

        Raises
        ------
        InputError
            The settings file is damaged, a field is unknown or out of range, or a value
            differs from the fixed settings.
        """
        from prescreen.physics.dft import LabelSettings

        asked = {k: v for k, v in asked.items() if v is not None}
        fixed = self._fixed_label_settings()
        if fixed is None:
            return LabelSettings.from_dict(LabelSettings().as_dict() | asked)
        wanted = LabelSettings.from_dict(fixed.as_dict() | asked)
        for key in sorted(asked):
            if getattr(wanted, key) != getattr(fixed, key):
                raise self._other_settings(fixed, key, asked[key])
        return fixed

    @property
    def label_settings_fixed(self) -> bool:
        """Whether a ``prescreen label`` run has fixed the campaign's level of theory."""
        from prescreen.physics.labeller import SETTINGS_FILE

        return (self.labels_dir / SETTINGS_FILE).exists()

    def check_label_settings(self, settings: LabelSettings) -> LabelSettings:
        """``settings`` if they are this campaign's (or none are fixed yet).

        Raises
        ------
        InputError
            A field differs from the campaign's fixed settings (the first one is named).
        """
        from dataclasses import fields

        fixed = self._fixed_label_settings()
        if fixed is not None:
            for f in fields(fixed):
                if getattr(settings, f.name) != getattr(fixed, f.name):
                    raise self._other_settings(fixed, f.name, getattr(settings, f.name))
        return settings

    def describe_label_settings(self) -> str:
        """The built-in labeller's level of theory in words and whether a run fixed it,
        for status lines and reports; a damaged settings file is described, not raised."""
        try:
            settings = self.label_settings()
        except InputError as exc:
            return f"unknown: {exc}"
        return settings.describe() + (
            " (fixed by the campaign's first run of prescreen label)" if self.label_settings_fixed
            else " (the defaults: no built-in labelling in this campaign yet; the first run of "
                 "prescreen label fixes them)")

    def _fixed_label_settings(self) -> LabelSettings | None:
        """The settings in ``labels/settings.json``, or None when there is none yet.

        A file written before a field existed reads with that field's default, the
        behaviour of the release that wrote it (the labeller's
        :class:`~prescreen.physics.labeller.RecordStore` writes the completed file back).
        """
        from prescreen.physics.dft import LabelSettings
        from prescreen.physics.labeller import SETTINGS_FILE

        if not self.label_settings_fixed:
            return None
        spath = self.labels_dir / SETTINGS_FILE
        expected = ("the settings.json written by `prescreen label` (restore it from a backup; "
                    "each record in labels/records.jsonl repeats the settings it used)")
        try:
            raw = json.loads(spath.read_text())
        except json.JSONDecodeError as exc:
            raise InputError("labeller settings file is not valid JSON", path=spath,
                             line=exc.lineno, expected=expected) from exc
        if not isinstance(raw, dict):
            raise InputError("labeller settings file does not hold a JSON object", path=spath,
                             value=raw, expected=expected)
        try:
            fixed = LabelSettings.from_dict(raw)
        except (InputError, TypeError) as exc:
            why = exc.reason if isinstance(exc, InputError) else str(exc)
            raise InputError(f"labeller settings file is damaged: {why}", path=spath,
                             value=getattr(exc, "value", None), expected=expected) from exc
        return fixed

    def _other_settings(self, fixed: LabelSettings, key: str, value: Any) -> InputError:
        from prescreen.physics.labeller import SETTINGS_FILE

        used = "kpts" if key == "kpt_density" and fixed.kpts is not None else key
        return InputError(
            f"asked for {key}={value!r}, but this campaign's labels were computed with "
            f"{used}={getattr(fixed, used)!r}; mixing levels of theory in one campaign makes "
            "its labels incomparable", path=self.labels_dir / SETTINGS_FILE,
            expected=f"{used}={getattr(fixed, used)!r} (or leave the option out; for another "
                     "level of theory, start a new campaign)")

    # ------------------------------------------------------------------ candidates
    def add_candidates(
        self,
        items: Iterable[Candidate | Rejection],
        *,
        progress: bool = False,
        _after_each: Callable[[int], None] | None = None,
    ) -> CandidateIngestReport:
        """Add candidates (and record rejections) in one transaction.

        Each structure is checked for being a monolayer (flagged, never dropped) and
        compared with the candidates already present for duplicates (recorded with the
        ID it repeats, never deleted). An ID already in the store with the same content
        is skipped, so adding a source twice changes nothing; the same ID with other
        content is rejected.

        Parameters
        ----------
        items
            Candidates and rejections, e.g. from :func:`prescreen.io.iter_candidates`.
        progress
            Show a progress bar.
        """
        from prescreen.dedupe import DuplicateFinder
        from prescreen.monolayer import check_monolayer

        report = CandidateIngestReport()
        now = _now()
        seq0 = self._conn.execute("SELECT COALESCE(MAX(seq), 0) FROM candidates").fetchone()[0]
        rej0 = self._conn.execute("SELECT COALESCE(MAX(seq), 0) FROM rejections").fetchone()[0]
        read: set[str] = set()  # the files this add read (a source is "path" or "path:entry")
        still: set[int] = set()  # earlier rejections that this add met again
        finder = DuplicateFinder(existing=self._representatives_loader())
        iterator: Iterable[Candidate | Rejection] = items
        if progress:
            from tqdm.auto import tqdm

            iterator = tqdm(items, desc="candidates", unit=" cand")
        with self._transaction() as conn:
            for i, item in enumerate(iterator):
                if isinstance(item, Rejection):
                    read.add(item.path)
                    still.add(self._record_rejection(conn, "candidate", item, now))
                    report.rejections.append(item)
                    continue
                read.update({item.source, item.source.rsplit(":", 1)[0]})
                outcome = self._insert_candidate(conn, item, finder, check_monolayer, now,
                                                 seq0 + i + 1)
                if isinstance(outcome, Rejection):
                    still.add(self._record_rejection(conn, "candidate", outcome, now))
                    report.rejections.append(outcome)
                elif outcome == "present":
                    report.already_present += 1
                else:
                    report.added += 1
                    report.layer_counts[outcome[0]] = report.layer_counts.get(outcome[0], 0) + 1
                    report.duplicates += outcome[1] is not None
                if _after_each is not None:
                    _after_each(i)
            # a file read again stands as it is now: its earlier rejections that did not
            # come up again were fixed (kept, marked superseded, out of the counts)
            for path in read:
                conn.execute(
                    "UPDATE rejections SET superseded_at=? WHERE kind='candidate' AND path=? "
                    "AND seq<=? AND superseded_at IS NULL", (now, path, rej0))
            if still:
                marks = ",".join("?" * len(still))
                conn.execute(f"UPDATE rejections SET superseded_at=NULL WHERE seq IN ({marks})",
                             tuple(still))
        return report

    def _representatives_loader(self) -> Callable[[str], list[tuple[str, Structure | None]]]:
        """Return a function giving the non-duplicate candidates stored for a formula."""

        def load(reduced_formula: str) -> list[tuple[str, Structure | None]]:
            rows = self._conn.execute(
                "SELECT id, structure FROM candidates WHERE reduced_formula=? "
                "AND duplicate_of IS NULL ORDER BY seq",
                (reduced_formula,),
            ).fetchall()
            return [(cid, _unpack_structure(blob)) for cid, blob in rows]

        return load

    def _insert_candidate(self, conn, cand, finder, check_monolayer, now, seq):
        from prescreen.chem import formula_keys

        row = conn.execute(
            "SELECT formula, source, structure FROM candidates WHERE id=?", (cand.id,)
        ).fetchone()
        blob = _pack_structure(cand.structure)
        if row is not None:
            if row[2] == blob and (blob is not None or row[0] == cand.formula):
                return "present"
            return Rejection(
                path=cand.source.rsplit(":", 1)[0] if ":" in cand.source else cand.source,
                line=cand.source.rsplit(":", 1)[1] if ":" in cand.source else None,
                value=cand.id,
                reason=f"ID {cand.id!r} is already used by a different candidate from "
                f"{row[1]}; expected a unique ID",
            )
        try:
            reduced, chemsys, elements = formula_keys(cand.formula)
        except InputError as exc:
            return Rejection(path=cand.source, line=None, value=cand.formula,
                             reason=f"cannot parse formula: {exc.reason}")
        check = None
        if cand.structure is not None:
            check = check_monolayer(cand.structure)
            layer = (check.status, check.thickness_A, check.vacuum_A, check.reason)
            n_atoms = len(cand.structure)
        else:
            layer = ("formula_only", None, None, "composition only: no structure given")
            n_atoms = None
        dup = finder.duplicate_of(cand.id, reduced, cand.structure, check)
        conn.execute(
            "INSERT INTO candidates (id, formula, reduced_formula, chemsys, source, n_atoms,"
            " structure, layer_status, thickness_A, vacuum_A, layer_reason, duplicate_of,"
            " hazard, meta, added_at, seq) VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?)",
            (cand.id, cand.formula, reduced, chemsys, cand.source, n_atoms, blob, *layer,
             dup, hazard_text(elements), json.dumps(cand.meta, sort_keys=True), now, seq),
        )
        return (layer[0], dup)

    @staticmethod
    def _record_rejection(conn, kind: str, rej: Rejection, now: str) -> int:
        """Store a rejection once; returns its row's seq (new, or the same one seen before)."""
        # "IS" rather than the UNIQUE constraint: SQLite treats NULL lines as distinct, so
        # a whole-file rejection would otherwise be stored again on every run.
        line = None if rej.line is None else str(rej.line)
        conn.execute(
            "INSERT INTO rejections (kind, path, line, value, reason, at) "
            "SELECT ?,?,?,?,?,? WHERE NOT EXISTS (SELECT 1 FROM rejections WHERE kind=? "
            "AND path=? AND line IS ? AND value=? AND reason=?)",
            (kind, rej.path, line, rej.value, rej.reason, now,
             kind, rej.path, line, rej.value, rej.reason),
        )
        return int(conn.execute(
            "SELECT seq FROM rejections WHERE kind=? AND path=? AND line IS ? AND value=? "
            "AND reason=?", (kind, rej.path, line, rej.value, rej.reason)).fetchone()[0])

    def candidate_ids(self) -> list[str]:
        return [r[0] for r in self._conn.execute("SELECT id FROM candidates ORDER BY seq")]

    def structure(self, candidate_id: str) -> Structure | None:
        """The stored structure of one candidate (``None`` for composition-only ones)."""
        row = self._conn.execute(
            "SELECT structure FROM candidates WHERE id=?", (candidate_id,)
        ).fetchone()
        if row is None:
            raise InputError("unknown candidate ID", value=candidate_id,
                             expected=f"an ID of campaign {self.name!r}")
        return _unpack_structure(row[0])

    def iter_structures(self, ids: Sequence[str] | None = None) -> Iterator[tuple[str, Structure | None]]:
        """Yield ``(id, structure)`` in insertion order (all candidates, or ``ids``)."""
        if ids is None:
            cur = self._conn.execute("SELECT id, structure FROM candidates ORDER BY seq")
            for cid, blob in cur:
                yield cid, _unpack_structure(blob)
        else:
            for cid in ids:
                yield cid, self.structure(cid)

    def candidates_frame(self) -> pd.DataFrame:
        """All candidates with their flags and current label, one row each, in order."""
        import pandas as pd

        df = pd.read_sql_query(
            "SELECT c.id, c.formula, c.reduced_formula, c.chemsys, c.source, c.n_atoms,"
            " c.layer_status, c.thickness_A, c.vacuum_A, c.layer_reason, c.duplicate_of,"
            " c.hazard, r.spillage, r.core_hours"
            " FROM candidates c LEFT JOIN results r"
            " ON r.candidate_id = c.id AND r.active = 1 ORDER BY c.seq",
            self._conn,
        )
        for column in ("spillage", "core_hours"):  # None when nothing is labelled yet
            df[column] = pd.to_numeric(df[column]).astype(float)
        df["labelled"] = df["spillage"].notna()
        return df.set_index("id")

    # ------------------------------------------------------------------ results
    def ingest_results(
        self,
        rows_and_rejections: tuple[Sequence[Any], Sequence[Rejection]],
        *,
        on_conflict: ConflictPolicy = "error",
        _after_each: Callable[[int], None] | None = None,
    ) -> ResultIngestReport:
        """Store DFT results in one transaction.

        Rows whose ID is not a candidate are rejected; valid rows land. A row equal to
        the stored value changes nothing, so ingesting a file twice is harmless. A
        different value for an ID that already has one is a conflict, settled by
        ``on_conflict``: ``"error"`` (reject the row, keep the old value), ``"keep"``
        (keep the old value silently counted) or ``"replace"`` (the new value becomes
        active; the old one stays in the history).

        Parameters
        ----------
        rows_and_rejections
            The pair returned by :func:`prescreen.io.results.read_results`.
        on_conflict
            Policy for a second, different value for one ID.
        """
        if on_conflict not in _POLICIES:
            raise InputError("unknown conflict policy", value=on_conflict,
                             expected=" or ".join(_POLICIES))
        if not (isinstance(rows_and_rejections, tuple) and len(rows_and_rejections) == 2):
            raise InputError("results must come as the (rows, rejections) pair",
                             value=type(rows_and_rejections).__name__,
                             expected="read_results(path), or results_from_frame(df) for a "
                                      "pandas table")
        from prescreen.io.results import GAP_ROUNDING_EV

        rows, rejections = rows_and_rejections
        report = ResultIngestReport(rejections=list(rejections))
        now = _now()
        known = set(self.candidate_ids())
        with self._transaction() as conn:
            for rej in rejections:
                self._record_rejection(conn, "result", rej, now)
            for i, row in enumerate(rows):
                path, _, line_text = row.source.rpartition(":")
                line: int | str | None = (int(line_text) if line_text.isdigit()
                                          else line_text or None)
                if row.id not in known:
                    rej = Rejection(path=path, line=line, value=row.id,
                                    reason="unknown candidate ID; expected an ID of "
                                    f"campaign {self.name!r}")
                    self._record_rejection(conn, "result", rej, now)
                    report.rejections.append(rej)
                    continue
                old = conn.execute(
                    "SELECT seq, spillage, gap_soc_eV, direct_gap_soc_eV FROM results"
                    " WHERE candidate_id=? AND active=1", (row.id,),
                ).fetchone()
                clash: list[tuple[str, Any, Any]] = []
                if old is not None and old[1] == row.spillage:
                    # The same result. A missing gap is not a different value: a row
                    # without one changes nothing, and a row with one completes a stored
                    # result that had none (in place: nothing is lost).
                    gaps = {"gap_soc_eV": (old[2], row.gap_soc_eV),
                            "direct_gap_soc_eV": (old[3], row.direct_gap_soc_eV)}
                    clash = [(n, was, new) for n, (was, new) in gaps.items()
                             if was is not None and new is not None and was != new]
                    fill = {n: new for n, (was, new) in gaps.items()
                            if was is None and new is not None}
                    merged = [new if was is None else was for was, new in gaps.values()]
                    if (fill and not clash and None not in merged
                            and merged[1] < merged[0] - GAP_ROUNDING_EV):
                        rej = Rejection(
                            path=path, line=line, value=f"{row.id}={row.spillage!r} "
                            f"(gap_soc_eV {merged[0]!r}, direct_gap_soc_eV {merged[1]!r})",
                            reason="the direct gap would fall below the band gap stored "
                                   "with the other; expected a smallest direct gap of at "
                                   "least the band gap")
                        self._record_rejection(conn, "result", rej, now)
                        report.rejections.append(rej)
                        continue
                    if not clash and not fill:
                        report.unchanged += 1
                        continue
                    if not clash:
                        conn.execute("UPDATE results SET "
                                     + ", ".join(f"{n}=?" for n in fill) + " WHERE seq=?",
                                     (*fill.values(), old[0]))
                        report.gaps_added += 1
                        continue
                if old is not None:
                    if on_conflict == "keep":
                        report.kept_existing += 1
                        continue
                    if on_conflict == "error":
                        rej = Rejection(
                            path=path, line=line, value=f"{row.id}={row.spillage!r}"
                            + (f" ({clash[0][0]} {clash[0][2]!r})" if clash else ""),
                            reason=("conflicts with the stored "
                                    + (f"{clash[0][0]} {clash[0][1]!r}" if clash
                                       else f"spillage {old[1]!r}")
                                    + " for this ID; expected the same value, or choose "
                                    "on_conflict 'keep' or 'replace'"),
                        )
                        self._record_rejection(conn, "result", rej, now)
                        report.rejections.append(rej)
                        continue
                    conn.execute("UPDATE results SET active=0 WHERE seq=?", (old[0],))
                    report.replaced += 1
                else:
                    report.added += 1
                conn.execute(
                    "INSERT INTO results (candidate_id, spillage, functional, code, kmesh,"
                    " core_hours, notes, source, ingested_at, gap_soc_eV, direct_gap_soc_eV)"
                    " VALUES (?,?,?,?,?,?,?,?,?,?,?)",
                    (row.id, row.spillage, row.functional, row.code, row.kmesh,
                     row.core_hours, row.notes, row.source, now, row.gap_soc_eV,
                     row.direct_gap_soc_eV),
                )
                conn.execute(
                    "UPDATE proposals SET status='done' WHERE candidate_id=? AND status='pending'",
                    (row.id,),
                )
                if _after_each is not None:
                    _after_each(i)
        return report

    def labels(self) -> pd.DataFrame:
        """Active results: one row per labelled candidate (``id``, ``spillage``, ...)."""
        import pandas as pd

        return pd.read_sql_query(
            "SELECT candidate_id AS id, spillage, functional, code, kmesh, core_hours,"
            " gap_soc_eV, direct_gap_soc_eV, notes, source, ingested_at"
            " FROM results WHERE active=1 ORDER BY seq",
            self._conn,
        ).set_index("id")

    def rejections(self, kind: str | None = None, *,
                   include_superseded: bool = False) -> list[Rejection]:
        """Rejected entries, oldest first.

        Parameters
        ----------
        kind
            ``"candidate"`` or ``"result"``; both when None.
        include_superseded
            Also those of candidate files read again since, where the entry no longer
            failed (the user fixed it); they are kept, not deleted.
        """
        sql = "SELECT path, line, value, reason FROM rejections WHERE 1=1"
        args: tuple[str, ...] = ()
        if kind is not None:
            sql += " AND kind=?"
            args = (kind,)
        if not include_superseded:
            sql += " AND superseded_at IS NULL"
        return [Rejection(p, int(line) if line is not None and line.isdigit() else line, v, r)
                for p, line, v, r in self._conn.execute(sql + " ORDER BY seq", args)]

    # ------------------------------------------------------------------ status
    def status(self) -> CampaignStatus:
        """Counts of candidates, flags, labels and rounds."""
        q = self._conn.execute

        def count(sql: str, *args: Any) -> int:
            return int(q(sql, args).fetchone()[0])

        layer = dict(q("SELECT layer_status, COUNT(*) FROM candidates GROUP BY layer_status"))
        return CampaignStatus(
            name=self.name,
            path=str(self.path),
            candidates=count("SELECT COUNT(*) FROM candidates"),
            with_structure=count("SELECT COUNT(*) FROM candidates WHERE structure IS NOT NULL"),
            formula_only=layer.get("formula_only", 0),
            monolayers=layer.get("monolayer", 0),
            not_2d=layer.get("not_2d", 0),
            ambiguous=layer.get("ambiguous", 0),
            duplicates=count("SELECT COUNT(*) FROM candidates WHERE duplicate_of IS NOT NULL"),
            flagged_hazard=count("SELECT COUNT(*) FROM candidates WHERE hazard != ''"),
            labelled=count("SELECT COUNT(*) FROM results WHERE active=1"),
            positives=count("SELECT COUNT(*) FROM results WHERE active=1 AND spillage >= ?",
                            self.threshold),
            threshold=self.threshold,
            rejections=count("SELECT COUNT(*) FROM rejections WHERE superseded_at IS NULL"),
            rounds=count("SELECT COUNT(*) FROM rounds"),
            pending=count("SELECT COUNT(*) FROM proposals WHERE status='pending'"),
            models=count("SELECT COUNT(*) FROM models"),
        )

    # ------------------------------------------------------------------ features
    def features(
        self,
        compute: Callable[[list[str], list[str], list[Structure | None]], pd.DataFrame],
        schema: str,
        *,
        ids: Sequence[str] | None = None,
    ) -> pd.DataFrame:
        """Descriptors for candidates, cached as Parquet keyed by the feature schema.

        Rows already cached under ``schema`` are read back; the others are computed with
        ``compute(ids, formulas, structures)`` and appended. A cache written under any
        other schema is never read (its file name carries the schema), so a changed
        feature definition always means recomputation.
        """
        import pandas as pd

        if not schema or any(ch in schema for ch in "/\\"):
            raise InputError("feature schema must be a plain non-empty string", value=schema,
                             expected="e.g. a hex digest")
        cache = self.path / "features" / f"{schema}.parquet"
        cached = pd.read_parquet(cache) if cache.is_file() else None
        wanted = list(ids) if ids is not None else self.candidate_ids()
        have = set() if cached is None else set(cached.index)
        missing = [i for i in wanted if i not in have]
        if missing:
            formulas = dict(self._conn.execute("SELECT id, formula FROM candidates"))
            structs = [self.structure(i) for i in missing]
            new = compute(missing, [formulas[i] for i in missing], structs)
            new.index = pd.Index(missing, name="id")
            cached = new if cached is None else pd.concat([cached, new])
            cache.parent.mkdir(exist_ok=True)
            with replacing(cache) as tmp:
                cached.to_parquet(tmp)
        if cached is None:  # nothing wanted and nothing cached yet
            return pd.DataFrame(index=pd.Index([], name="id"))
        return cached.loc[wanted]

    # ------------------------------------------------------------------ rounds & models
    def record_round(
        self,
        *,
        strategy: str,
        budget_core_hours: float,
        seed: int | None,
        model_version: str | None,
        proposals: Sequence[dict[str, Any]],
        settings: dict[str, Any] | None = None,
    ) -> int:
        """Store a proposed batch as the next round; returns the round number."""
        with self._transaction() as conn:
            number = conn.execute("SELECT COALESCE(MAX(number), 0) + 1 FROM rounds").fetchone()[0]
            conn.execute(
                "INSERT INTO rounds VALUES (?,?,?,?,?,?,?)",
                (number, _now(), strategy, float(budget_core_hours), seed, model_version,
                 json.dumps(settings or {}, sort_keys=True)),
            )
            for rank, p in enumerate(proposals, start=1):
                conn.execute(
                    "INSERT INTO proposals (round, candidate_id, rank, probability,"
                    " uncertainty, cost_core_hours, reason) VALUES (?,?,?,?,?,?,?)",
                    (number, p["id"], rank, p.get("probability"), p.get("uncertainty"),
                     p.get("cost_core_hours"), p.get("reason")),
                )
        return int(number)

    def pending_ids(self) -> list[str]:
        return [r[0] for r in self._conn.execute(
            "SELECT candidate_id FROM proposals WHERE status='pending' ORDER BY round, rank")]

    def proposals(self, round_number: int | None = None) -> pd.DataFrame:
        import pandas as pd

        sql = "SELECT * FROM proposals"
        args: tuple[int, ...] = ()
        if round_number is not None:
            sql += " WHERE round=?"
            args = (round_number,)
        return pd.read_sql_query(sql + " ORDER BY round, rank", self._conn, params=args)

    def record_model(self, version: str, path: str | Path, *, feature_schema: str,
                     training_rows: int, metrics: dict[str, Any],
                     settings: dict[str, Any] | None = None) -> None:
        """Record a trained model: where it is, its schema, metrics and training settings."""
        with self._transaction() as conn:
            conn.execute(
                "INSERT OR REPLACE INTO models VALUES (?,?,?,?,?,?,?)",
                (version, str(path), _now(), feature_schema, training_rows,
                 json.dumps(metrics, sort_keys=True), json.dumps(settings or {}, sort_keys=True)),
            )

    def latest_model(self) -> dict[str, Any] | None:
        """The newest model record (see :meth:`model_record`), or None."""
        return self._model_row("ORDER BY created_at DESC, rowid DESC LIMIT 1", ())

    def model_record(self, version: str) -> dict[str, Any] | None:
        """The record of model ``version``: path, schema, rows, metrics, training settings."""
        return self._model_row("WHERE version=?", (str(version),))

    def _model_row(self, where: str, args: tuple[Any, ...]) -> dict[str, Any] | None:
        row = self._conn.execute(
            "SELECT version, path, created_at, feature_schema, training_rows, metrics, settings "
            f"FROM models {where}", args
        ).fetchone()
        if row is None:
            return None
        keys = ("version", "path", "created_at", "feature_schema", "training_rows", "metrics",
                "settings")
        out = dict(zip(keys, row))
        out["metrics"] = json.loads(out["metrics"])
        out["settings"] = json.loads(out["settings"])
        return out

    def fingerprint(self) -> str:
        """A hash of the labelled data, to tie a model to what it was trained on."""
        h = hashlib.sha256()
        for cid, val in self._conn.execute(
            "SELECT candidate_id, spillage FROM results WHERE active=1 ORDER BY candidate_id"
        ):
            h.update(f"{cid}\t{val!r}\n".encode())
        return h.hexdigest()[:16]
