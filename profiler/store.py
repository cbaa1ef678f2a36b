"""The results store: one SQLite file holding studies, their points, workers and environments.

Durability rules (DESIGN.md "Measurement rules"): the file is in WAL mode and every point is
written in its own transaction the moment it is measured, so a study killed at any moment
(``kill -9`` included) loses at most the points in flight and never a stored one; a
``UNIQUE(study_id, curve, size)`` constraint makes a duplicate point impossible rather than
merely unlikely.

Studies are keyed by name and the hash of their spec (:meth:`StudySpec.spec_hash`, which leaves
out the budget): ``open_study(..., resume=True)`` returns the latest study with the same name and
hash, so only its missing points are measured; a changed spec is a new study. Without
``resume`` the same spec run again is a new study (``name-hash-2``, ...).

A file that is not an infercost store (another program's SQLite database, a text file, a
corrupt file) raises :class:`~profiler.errors.StoreError` before anything is written to it: the
SQLite header's ``application_id`` is checked first, then ``PRAGMA quick_check`` and the schema
version, all before the first write.
"""

from __future__ import annotations

import json
import math
import sqlite3
import threading
import time
from pathlib import Path
from typing import Any, Iterable

from profiler.errors import InputError, StoreError
from profiler.records import CurveResult, CurveSpec, Point, StudyResult, StudySpec

__all__ = ["Store", "load_points", "points_csv_rows", "POINT_COLUMNS", "APPLICATION_ID",
           "SCHEMA_VERSION"]

#: SQLite ``application_id`` of an infercost store ("ICST").
APPLICATION_ID = 0x49435354
SCHEMA_VERSION = 1

_SCHEMA = """
CREATE TABLE meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE studies (
    study_id TEXT PRIMARY KEY,
    name TEXT NOT NULL,
    spec_hash TEXT NOT NULL,
    seq INTEGER NOT NULL,
    spec_json TEXT NOT NULL,
    environment_json TEXT NOT NULL,
    started_at REAL NOT NULL,
    finished_at REAL,
    out_dir TEXT,
    UNIQUE (name, spec_hash, seq)
);
CREATE TABLE runs (
    study_id TEXT NOT NULL REFERENCES studies(study_id),
    run INTEGER NOT NULL,
    resumed INTEGER NOT NULL,
    started_at REAL NOT NULL,
    finished_at REAL,
    environment_json TEXT NOT NULL,
    PRIMARY KEY (study_id, run)
);
CREATE TABLE curves (
    study_id TEXT NOT NULL REFERENCES studies(study_id),
    curve INTEGER NOT NULL,
    key TEXT NOT NULL,
    cut_by_budget INTEGER NOT NULL DEFAULT 0,
    reason TEXT NOT NULL DEFAULT '',
    theory TEXT,
    work_unit TEXT NOT NULL DEFAULT '',
    mechanism_knob TEXT NOT NULL DEFAULT '',
    PRIMARY KEY (study_id, curve)
);
CREATE TABLE workers (
    study_id TEXT NOT NULL REFERENCES studies(study_id),
    worker TEXT NOT NULL,
    environment_json TEXT NOT NULL,
    PRIMARY KEY (study_id, worker)
);
CREATE TABLE points (
    study_id TEXT NOT NULL REFERENCES studies(study_id),
    curve INTEGER NOT NULL,
    size INTEGER NOT NULL,
    run INTEGER NOT NULL,
    status TEXT NOT NULL,
    seconds_median REAL,
    work REAL,
    finished_at REAL NOT NULL,
    point_json TEXT NOT NULL,
    UNIQUE (study_id, curve, size)
);
"""

#: The interleaved sweep's repeats, kept apart so that point rows are never rewritten; added
#: to a store written before it existed when that store is next opened.
_SWEEPS_TABLE = """
CREATE TABLE IF NOT EXISTS sweeps (
    study_id TEXT NOT NULL REFERENCES studies(study_id),
    curve INTEGER NOT NULL,
    size INTEGER NOT NULL,
    run INTEGER NOT NULL,
    seconds_json TEXT NOT NULL,
    finished_at REAL NOT NULL,
    PRIMARY KEY (study_id, curve, size, run)
)
"""

_SQLITE_MAGIC = b"SQLite format 3\x00"

#: Columns of ``points.csv`` / :func:`load_points`, in order (profile columns follow,
#: prefixed ``profile_``). ``seconds_fastest`` is the point's fastest repeat
#: (:attr:`profiler.records.Point.seconds_fastest`; the cap per query for censored points);
#: the report adds ``seconds_fitted``, the cost the time verdict was fitted on.
POINT_COLUMNS = ("study", "study_id", "curve", "curve_key", "family", "level", "method", "axis",
                 "topology", "fixed", "size", "status", "seconds_median", "seconds_min",
                 "seconds_max", "seconds_spread", "repeats", "loops", "n_queries", "work",
                 "predicted_work", "peak_bytes", "build_seconds", "max_error", "worker",
                 "finished_at", "message", "seconds_fastest")


def _dumps(obj: Any) -> str:
    return json.dumps(obj, sort_keys=True, default=_json_default)


def _json_default(obj: Any) -> Any:
    for attr in ("item", "tolist"):
        fn = getattr(obj, attr, None)
        if callable(fn):
            return fn()
    if isinstance(obj, (set, frozenset, tuple)):
        return list(obj)
    return str(obj)


def _check_header(path: Path) -> bool:
    """True if ``path`` is an empty file (a new store); raise StoreError unless it is ours."""
    try:
        size = path.stat().st_size
    except OSError as exc:
        raise StoreError(f"{path}: cannot read the results store ({exc.strerror})") from exc
    if size == 0:
        return True
    try:
        with open(path, "rb") as fh:
            header = fh.read(100)
    except OSError as exc:
        raise StoreError(f"{path}: cannot read the results store ({exc.strerror})") from exc
    if len(header) < 100 or not header.startswith(_SQLITE_MAGIC):
        raise StoreError(f"{path}: not an infercost results store (not an SQLite database); "
                         "file left untouched")
    app_id = int.from_bytes(header[68:72], "big")
    if app_id != APPLICATION_ID:
        raise StoreError(f"{path}: not an infercost results store (SQLite application_id "
                         f"{app_id:#x}, expected {APPLICATION_ID:#x}); file left untouched")
    return False


class Store:
    """An infercost results store bound to one SQLite file.

    Parameters
    ----------
    path
        The SQLite file (default of the CLI: ``reports/infercost.sqlite``).
    create
        Create the file (and its folder) when it does not exist; with False a missing file is
        a :class:`~profiler.errors.StoreError`.

    Raises
    ------
    StoreError
        The file is missing (``create=False``), not an SQLite database, another program's
        database, corrupt, or written by a newer infercost. The file is left untouched.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> from profiler.records import CurveSpec, StudySpec
    >>> tmp = pathlib.Path(tempfile.mkdtemp()) / "s.sqlite"
    >>> with Store(tmp) as store:
    ...     sid = store.open_study(StudySpec("demo", (CurveSpec("circuit", "associational",
    ...                            "exact", "graph", "chain", 2),)), {}, resume=False)
    ...     sid.startswith("demo-")
    True

    Notes
    -----
    One connection, guarded by a lock so a store may be shared by threads. Writes are one
    transaction each (O(1) per point); :meth:`load_study` is O(points).
    """

    def __init__(self, path: str | Path, *, create: bool = True) -> None:
        self.path = Path(path)
        self._lock = threading.RLock()
        self._runs: dict[str, int] = {}
        exists = self.path.exists()
        if not exists and not create:
            raise StoreError(f"{self.path}: no results store there (run a study first)")
        if exists and self.path.is_dir():
            raise StoreError(f"{self.path}: is a folder, expected an SQLite file")
        new = True if not exists else _check_header(self.path)
        if not exists:
            self.path.parent.mkdir(parents=True, exist_ok=True)
        try:
            self._con = sqlite3.connect(str(self.path), timeout=30.0, isolation_level=None,
                                        check_same_thread=False)
        except sqlite3.Error as exc:
            raise StoreError(f"{self.path}: cannot open the results store ({exc})") from exc
        try:
            if new:
                self._create()
            else:
                self._validate()
            self._con.execute("PRAGMA journal_mode=WAL")
            self._con.execute("PRAGMA synchronous=NORMAL")  # WAL + NORMAL: no corruption on kill
            self._con.execute("PRAGMA foreign_keys=ON")
            self._con.execute("PRAGMA busy_timeout=30000")
        except sqlite3.DatabaseError as exc:
            self._con.close()
            raise StoreError(f"{self.path}: corrupt results store ({exc}); file left untouched") \
                from exc
        except StoreError:
            self._con.close()
            raise

    # -- lifecycle -----------------------------------------------------------------------------
    def _create(self) -> None:
        con = self._con
        # Rollback-journal mode for the creating transaction, so the application_id lands in the
        # main file's header at once (in WAL mode it would wait for a checkpoint).
        con.execute("BEGIN")
        try:
            con.execute(f"PRAGMA application_id={APPLICATION_ID}")
            for statement in (_SCHEMA + ";" + _SWEEPS_TABLE).strip().split(";"):
                if statement.strip():
                    con.execute(statement)
            con.executemany("INSERT INTO meta(key, value) VALUES (?, ?)",
                            [("app", "infercost"), ("schema", str(SCHEMA_VERSION)),
                             ("created_at", repr(time.time()))])
            con.execute("COMMIT")
        except BaseException:
            con.execute("ROLLBACK")
            raise

    def _validate(self) -> None:
        con = self._con
        row = con.execute("PRAGMA quick_check").fetchone()
        if not row or row[0] != "ok":
            raise StoreError(f"{self.path}: corrupt results store (integrity check: "
                             f"{row[0] if row else 'no answer'}); file left untouched")
        tables = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        needed = {"meta", "studies", "runs", "curves", "workers", "points"}
        if not needed <= tables:
            raise StoreError(f"{self.path}: not an infercost results store (tables missing: "
                             f"{', '.join(sorted(needed - tables))}); file left untouched")
        meta = dict(con.execute("SELECT key, value FROM meta").fetchall())
        try:
            version = int(meta.get("schema", "0"))
        except ValueError:
            version = 0
        if meta.get("app") != "infercost" or version < 1:
            raise StoreError(f"{self.path}: not an infercost results store (meta table); "
                             "file left untouched")
        if version > SCHEMA_VERSION:
            raise StoreError(f"{self.path}: store schema {version} is newer than this infercost "
                             f"understands ({SCHEMA_VERSION}); upgrade infercost")
        if "sweeps" not in tables:
            try:
                con.execute(_SWEEPS_TABLE)
            except sqlite3.OperationalError:
                pass  # a read-only store: it simply has no sweeps (see points())

    def close(self) -> None:
        with self._lock:
            try:
                self._con.close()
            except sqlite3.Error:
                pass

    def __enter__(self) -> "Store":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def _tx(self, statements: Iterable[tuple[str, tuple]]) -> int:
        """Run ``statements`` in one transaction; returns the number of rows they changed."""
        with self._lock:
            con = self._con
            con.execute("BEGIN IMMEDIATE")
            changed = 0
            try:
                for sql, args in statements:
                    changed += max(con.execute(sql, args).rowcount, 0)
                con.execute("COMMIT")
            except BaseException:
                con.execute("ROLLBACK")
                raise
        return changed

    # -- studies -------------------------------------------------------------------------------
    def open_study(self, spec: StudySpec, environment: dict, *, resume: bool) -> str:
        """Start a run of ``spec``; return the study id (the resumed one when ``resume``).

        With ``resume`` the latest study of the same name and spec hash continues (a new run is
        recorded with this environment); without a match, or without ``resume``, a new study
        is created.
        """
        digest = spec.spec_hash()
        now = time.time()
        with self._lock:
            rows = self._con.execute(
                "SELECT study_id, seq FROM studies WHERE name=? AND spec_hash=? ORDER BY seq DESC",
                (spec.name, digest)).fetchall()
            if resume and rows:
                study_id = rows[0][0]
                run = 1 + self._con.execute("SELECT COALESCE(MAX(run), 0) FROM runs WHERE "
                                            "study_id=?", (study_id,)).fetchone()[0]
                self._tx([("UPDATE studies SET finished_at=NULL WHERE study_id=?", (study_id,)),
                          ("INSERT INTO runs VALUES (?, ?, 1, ?, NULL, ?)",
                           (study_id, run, now, _dumps(environment)))])
            else:
                seq = 1 + (rows[0][1] if rows else 0)
                study_id = f"{spec.name}-{digest[:8]}" + ("" if seq == 1 else f"-{seq}")
                run = 1
                self._tx([("INSERT INTO studies VALUES (?, ?, ?, ?, ?, ?, ?, NULL, NULL)",
                           (study_id, spec.name, digest, seq, _dumps(spec.to_dict()),
                            _dumps(environment), now)),
                          ("INSERT INTO runs VALUES (?, ?, 0, ?, NULL, ?)",
                           (study_id, run, now, _dumps(environment)))]
                         + [("INSERT INTO curves(study_id, curve, key) VALUES (?, ?, ?)",
                             (study_id, i, c.key())) for i, c in enumerate(spec.curves)])
            self._runs[study_id] = run
        return study_id

    def finish_study(self, study_id: str, *, out_dir: str | Path | None = None) -> None:
        """Mark the current run (and the study) finished; remember the report folder."""
        now = time.time()
        run = self._runs.get(study_id)
        statements = [("UPDATE studies SET finished_at=? WHERE study_id=?", (now, study_id))]
        if out_dir is not None:
            statements.append(("UPDATE studies SET out_dir=? WHERE study_id=?",
                               (str(out_dir), study_id)))
        if run is not None:
            statements.append(("UPDATE runs SET finished_at=? WHERE study_id=? AND run=?",
                               (now, study_id, run)))
        self._tx(statements)

    def set_out_dir(self, study_id: str, out_dir: str | Path) -> None:
        self._tx([("UPDATE studies SET out_dir=? WHERE study_id=?", (str(out_dir), study_id))])

    # -- points, curves, workers ---------------------------------------------------------------
    def add_point(self, point: Point) -> None:
        """Store one point in its own transaction.

        Raises
        ------
        StoreError
            A point of the same (study, curve, size) is already stored, or the study is unknown.
        """
        run = self._runs.get(point.study, 0)
        d = point.to_dict()
        try:
            self._tx([("INSERT INTO points VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                       (point.study, int(point.curve), int(point.size), run, point.status,
                        _real(point.seconds_median), _real(point.work),
                        float(point.finished_at or time.time()), _dumps(d)))])
        except sqlite3.IntegrityError as exc:
            raise StoreError(f"{self.path}: point {point.study} curve {point.curve} size "
                             f"{point.size} is already stored (or its study is unknown)") from exc

    def add_sweep(self, point: Point) -> bool:
        """Store the interleaved sweep's repeats of a stored point (``interleaved_seconds``).

        Point rows are never rewritten: the repeats go to their own table, one row per (point,
        run), and :meth:`points` hands back each point with its latest run's repeats. Returns
        False, storing nothing, when the point itself is not stored.
        """
        run = self._runs.get(point.study, 0)
        seconds = _dumps([float(x) for x in point.interleaved_seconds])
        key = (point.study, int(point.curve), int(point.size))
        return self._tx([(
            "INSERT OR REPLACE INTO sweeps SELECT ?, ?, ?, ?, ?, ? WHERE EXISTS "
            "(SELECT 1 FROM points WHERE study_id=? AND curve=? AND size=?)",
            (*key, run, seconds, time.time(), *key))]) > 0

    def set_curve(self, study_id: str, index: int, *, key: str, cut_by_budget: bool,
                  reason: str = "", theory: str | None = None, work_unit: str = "",
                  mechanism_knob: str = "") -> None:
        """Record how a curve ended; empty facts keep what an earlier run stored."""
        self._tx([(
            "INSERT INTO curves VALUES (?, ?, ?, ?, ?, ?, ?, ?) "
            "ON CONFLICT(study_id, curve) DO UPDATE SET key=excluded.key, "
            "cut_by_budget=excluded.cut_by_budget, reason=excluded.reason, "
            "theory=COALESCE(excluded.theory, curves.theory), "
            "work_unit=CASE WHEN excluded.work_unit='' THEN curves.work_unit "
            "ELSE excluded.work_unit END, "
            "mechanism_knob=CASE WHEN excluded.mechanism_knob='' THEN curves.mechanism_knob "
            "ELSE excluded.mechanism_knob END",
            (study_id, int(index), key, int(bool(cut_by_budget)), reason, theory, work_unit,
             mechanism_knob))])

    def add_worker(self, study_id: str, worker: str, environment: dict) -> None:
        """Record a worker's environment (once per worker id)."""
        self._tx([("INSERT OR IGNORE INTO workers VALUES (?, ?, ?)",
                   (study_id, worker, _dumps(environment)))])

    def points(self, study_id: str) -> list[Point]:
        """Every stored point of a study, by curve then size."""
        with self._lock:
            rows = self._con.execute("SELECT point_json FROM points WHERE study_id=? "
                                     "ORDER BY curve, size", (study_id,)).fetchall()
            try:
                sweeps = self._con.execute("SELECT curve, size, seconds_json FROM sweeps "
                                           "WHERE study_id=? ORDER BY run", (study_id,)).fetchall()
            except sqlite3.OperationalError:  # an older store opened read-only
                sweeps = []
        latest = {(int(c), int(n)): text for c, n, text in sweeps}   # the last run's wins
        out = []
        for (text,) in rows:
            d = json.loads(text)
            swept = latest.get((int(d.get("curve", -1)), int(d.get("size", -1))))
            if swept is not None:
                d["interleaved_seconds"] = json.loads(swept)
            out.append(Point.from_dict(d))
        return out

    def runs(self, study_id: str) -> list[dict[str, Any]]:
        """The runs of a study with how many points each measured."""
        with self._lock:
            rows = self._con.execute(
                "SELECT r.run, r.resumed, r.started_at, r.finished_at, "
                "(SELECT COUNT(*) FROM points p WHERE p.study_id=r.study_id AND p.run=r.run) "
                "FROM runs r WHERE r.study_id=? ORDER BY r.run", (study_id,)).fetchall()
        return [{"run": r[0], "resumed": bool(r[1]), "started_at": r[2], "finished_at": r[3],
                 "n_points": r[4]} for r in rows]

    def studies(self) -> list[dict[str, Any]]:
        """Every study: id, name, spec hash, times, point count, report folder (oldest first)."""
        with self._lock:
            rows = self._con.execute(
                "SELECT s.study_id, s.name, s.spec_hash, s.started_at, s.finished_at, s.out_dir, "
                "(SELECT COUNT(*) FROM points p WHERE p.study_id=s.study_id) "
                "FROM studies s ORDER BY s.started_at, s.seq").fetchall()
        return [{"study_id": r[0], "name": r[1], "spec_hash": r[2], "started_at": r[3],
                 "finished_at": r[4], "out_dir": r[5], "n_points": r[6]} for r in rows]

    def resolve_study(self, name_or_id: str) -> str:
        """The study id of ``name_or_id``: an id, or the latest study of that name."""
        with self._lock:
            row = self._con.execute("SELECT study_id FROM studies WHERE study_id=?",
                                    (name_or_id,)).fetchone()
            if row is None:
                row = self._con.execute("SELECT study_id FROM studies WHERE name=? "
                                        "ORDER BY started_at DESC, seq DESC LIMIT 1",
                                        (name_or_id,)).fetchone()
            if row is None:
                known = sorted({r[0] for r in self._con.execute("SELECT name FROM studies")})
                raise InputError.at(str(self.path), "study",
                                    "a stored study name or id (" + (", ".join(known) or "none") +
                                    ")", name_or_id)
        return row[0]

    def load_latest(self) -> StudyResult:
        """The most recently started study."""
        with self._lock:
            row = self._con.execute("SELECT study_id FROM studies ORDER BY started_at DESC, "
                                    "seq DESC LIMIT 1").fetchone()
        if row is None:
            raise StoreError(f"{self.path}: the store holds no study yet")
        return self.load_study(row[0])

    def load_study(self, name_or_id: str) -> StudyResult:
        """A stored study with its curves and points (latest of that name, or by id).

        Raises
        ------
        InputError
            No such study in the store.
        """
        study_id = self.resolve_study(name_or_id)
        with self._lock:
            srow = self._con.execute("SELECT spec_json, environment_json, started_at, "
                                     "finished_at, out_dir FROM studies WHERE study_id=?",
                                     (study_id,)).fetchone()
            crows = self._con.execute("SELECT curve, cut_by_budget, theory, work_unit, "
                                      "mechanism_knob, reason FROM curves WHERE study_id=?",
                                      (study_id,)).fetchall()
            wrows = self._con.execute("SELECT worker, environment_json FROM workers "
                                      "WHERE study_id=?", (study_id,)).fetchall()
        spec = StudySpec.from_dict(json.loads(srow[0]))
        by_curve: dict[int, list[Point]] = {}
        for p in self.points(study_id):
            by_curve.setdefault(p.curve, []).append(p)
        facts = {r[0]: r for r in crows}
        curves = []
        for i, cspec in enumerate(spec.curves):
            f = facts.get(i)
            curves.append(CurveResult(
                index=i, spec=cspec, points=tuple(sorted(by_curve.get(i, ()), key=lambda p: p.size)),
                cut_by_budget=bool(f[1]) if f else False, theory=f[2] if f else None,
                work_unit=(f[3] or "") if f else "", mechanism_knob=(f[4] or "") if f else ""))
        return StudyResult(study_id=study_id, spec=spec, environment=json.loads(srow[1]),
                           curves=tuple(curves),
                           workers={w: json.loads(e) for w, e in wrows},
                           started_at=float(srow[2]), finished_at=srow[3], out_dir=srow[4])


def _real(value: Any) -> float | None:
    if value is None:
        return None
    try:
        f = float(value)
    except (TypeError, ValueError):
        return None
    return f if math.isfinite(f) else None


# ============================================================================ export
def points_csv_rows(result: StudyResult) -> list[dict[str, Any]]:
    """One flat dict per point of a study: the ``points.csv`` contract (DESIGN.md).

    Columns are :data:`POINT_COLUMNS` followed by ``profile_<name>`` for every structural
    profile entry seen in the study. ``study`` is the study's name, ``study_id`` its key.
    """
    rows = []
    profile_keys = sorted({k for c in result.curves for p in c.points for k in p.profile})
    for curve in result.curves:
        key = curve.spec.key()
        for p in curve.points:
            row = {"study": result.spec.name, "study_id": result.study_id, "curve": curve.index,
                   "curve_key": key}
            for col in POINT_COLUMNS[4:]:
                row[col] = getattr(p, col)
            # 0/1 beside status, so `infercost fit points.csv` reads lower bounds as such.
            row["censored"] = int(p.is_censored)
            for k in profile_keys:
                row[f"profile_{k}"] = p.profile.get(k)
            rows.append(row)
    return rows


def load_points(store: str | Path, study: str | None = None) -> "Any":
    """Every stored point as a :class:`pandas.DataFrame` (one row per point).

    Parameters
    ----------
    store
        Path of the SQLite store.
    study
        A study name (its latest study) or id; None: every study in the store.

    Returns
    -------
    pandas.DataFrame
        Columns :data:`POINT_COLUMNS` plus ``profile_*``.

    Raises
    ------
    StoreError
        Missing, foreign or corrupt store. InputError: unknown study.
    """
    import pandas as pd

    with Store(store, create=False) as st:
        ids = [st.resolve_study(study)] if study is not None else \
            [s["study_id"] for s in st.studies()]
        rows = [row for sid in ids for row in points_csv_rows(st.load_study(sid))]
    frame = pd.DataFrame(rows)
    if frame.empty:
        frame = pd.DataFrame(columns=list(POINT_COLUMNS))
    return frame
