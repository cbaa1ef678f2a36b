"""The SQLite store: round trips, resume keys, duplicates refused, foreign files left untouched."""

from __future__ import annotations

import hashlib
import sqlite3
from dataclasses import replace

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from profiler.errors import InputError, StoreError
from profiler.records import CurveSpec, Point, StudySpec
from profiler.store import APPLICATION_ID, POINT_COLUMNS, Store, load_points, points_csv_rows

CURVES = (CurveSpec("circuit", "associational", "exact", "graph", "chain", 4),
          CurveSpec("bayesnet", "interventional", "exact", "mechanism", "grid", 9,
                    sizes=(2, 3), params=(("n_samples", 100),)))
SPEC = StudySpec(name="unit", curves=CURVES, budget_s=10)


def point(study_id: str, curve: int, size: int, **kw) -> Point:
    c = CURVES[curve]
    values = dict(study=study_id, curve=curve, family=c.family, level=c.level, method=c.method,
                  axis=c.axis, topology=c.topology, fixed=c.fixed, size=size, status="ok",
                  seconds_median=1e-3 * size, seconds_min=9e-4 * size, seconds_max=1.1e-3 * size,
                  seconds_spread=0.05, repeats=5, loops=3, n_queries=4, work=10.0 * size,
                  predicted_work=10.0 * size, peak_bytes=1000, build_seconds=0.01,
                  max_error=0.0, worker="h:1", finished_at=1.0 + size,
                  profile={"n_variables": float(size)}, repeat_seconds=(1e-3,) * 5)
    values.update(kw)
    return Point(**values)


def sha(path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def test_points_round_trip(tmp_path):
    with Store(tmp_path / "s.sqlite") as s:
        sid = s.open_study(SPEC, {"host": "x"}, resume=False)
        pts = [point(sid, 0, n) for n in (8, 2, 4)] + [point(sid, 1, 3, status="timeout",
                                                              work=None, message="cap")]
        for p in pts:
            s.add_point(p)
        s.set_curve(sid, 0, key=CURVES[0].key(), cut_by_budget=True, reason="budget",
                    theory="polynomial", work_unit="edges", mechanism_knob="components")
        s.add_worker(sid, "h:1", {"pid": 1})
        s.finish_study(sid, out_dir="reports/unit")
        res = s.load_study("unit")
    assert res.study_id == sid and res.spec == SPEC and res.environment == {"host": "x"}
    assert [p.size for p in res.curves[0].points] == [2, 4, 8]  # size order
    stored = list(res.curves[0].points) + list(res.curves[1].points)
    assert sorted(stored, key=lambda p: (p.curve, p.size)) == \
        sorted(pts, key=lambda p: (p.curve, p.size))
    assert res.curves[0].cut_by_budget and res.curves[0].theory == "polynomial"
    assert res.curves[0].work_unit == "edges" and not res.curves[1].cut_by_budget
    assert res.workers == {"h:1": {"pid": 1}} and res.out_dir == "reports/unit"
    assert res.finished_at is not None


finite = st.floats(min_value=1e-12, max_value=1e12, allow_nan=False)


@settings(max_examples=30, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(size=st.integers(1, 10 ** 6), secs=finite, work=st.one_of(st.none(), finite),
       status=st.sampled_from(["ok", "timeout", "memory", "error", "wrong"]),
       message=st.text(max_size=50), profile=st.dictionaries(st.text(min_size=1, max_size=8),
                                                             finite, max_size=4))
def test_any_point_round_trips_equal(tmp_path_factory, size, secs, work, status, message, profile):
    """A stored point comes back equal, whatever its values."""
    path = tmp_path_factory.mktemp("h") / "s.sqlite"
    with Store(path) as s:
        sid = s.open_study(SPEC, {}, resume=False)
        p = point(sid, 0, size, seconds_median=secs, work=work, status=status, message=message,
                  profile=profile)
        s.add_point(p)
        assert s.points(sid) == [p]


def test_duplicate_point_is_refused(tmp_path):
    with Store(tmp_path / "s.sqlite") as s:
        sid = s.open_study(SPEC, {}, resume=False)
        s.add_point(point(sid, 0, 4))
        with pytest.raises(StoreError, match="already stored"):
            s.add_point(point(sid, 0, 4, status="error"))
        assert len(s.points(sid)) == 1


def test_sweep_repeats_are_stored_beside_the_point_rows_never_in_them(tmp_path):
    """The interleaved sweep's repeats come back with their point; the point rows themselves
    are not rewritten; repeats of a point that is not stored are refused."""
    with Store(tmp_path / "s.sqlite") as s:
        sid = s.open_study(SPEC, {}, resume=False)
        s.add_point(point(sid, 0, 4))
        s.add_point(point(sid, 0, 8))
        rows_before = s._con.execute("SELECT * FROM points ORDER BY size").fetchall()
        assert s.add_sweep(point(sid, 0, 4, interleaved_seconds=(3e-4,)))
        assert s.add_sweep(point(sid, 0, 4, interleaved_seconds=(1e-4, 2e-4)))  # same run: replaced
        assert not s.add_sweep(point(sid, 0, 16, interleaved_seconds=(1e-4,)))
        assert s._con.execute("SELECT * FROM points ORDER BY size").fetchall() == rows_before
        got = {p.size: p for p in s.points(sid)}
        assert sorted(got) == [4, 8]
        assert got[4].interleaved_seconds == (1e-4, 2e-4) and got[4].seconds_fastest == 1e-4
        assert got[8].interleaved_seconds == ()


def test_resume_keys_on_name_and_spec_hash(tmp_path):
    """Same spec + resume: same study; a changed spec: a new study; no resume: a new study."""
    with Store(tmp_path / "s.sqlite") as s:
        a = s.open_study(SPEC, {}, resume=False)
        assert s.open_study(SPEC, {}, resume=True) == a
        # the budget is not part of what is measured
        assert s.open_study(replace(SPEC, budget_s=999), {}, resume=True) == a
        changed = s.open_study(replace(SPEC, point_timeout_s=1.0), {}, resume=True)
        assert changed != a
        again = s.open_study(SPEC, {}, resume=False)
        assert again not in (a, changed)
        assert s.open_study(SPEC, {}, resume=True) == again  # resume takes the latest
        assert [r["run"] for r in s.runs(a)] == [1, 2, 3]
        assert s.load_study("unit").study_id == again


def test_runs_count_what_each_run_measured(tmp_path):
    with Store(tmp_path / "s.sqlite") as s:
        sid = s.open_study(SPEC, {}, resume=False)
        s.add_point(point(sid, 0, 2))
    with Store(tmp_path / "s.sqlite") as s:
        assert s.open_study(SPEC, {}, resume=True) == sid
        s.add_point(point(sid, 0, 3))
        s.add_point(point(sid, 0, 4))
        assert [r["n_points"] for r in s.runs(sid)] == [1, 2]


def test_foreign_sqlite_file_is_refused_and_untouched(tmp_path):
    path = tmp_path / "other.db"
    con = sqlite3.connect(path)
    con.execute("CREATE TABLE accounts (id INTEGER, balance REAL)")
    con.execute("INSERT INTO accounts VALUES (1, 2.5)")
    con.commit()
    con.close()
    before = sha(path)
    with pytest.raises(StoreError, match="not an infercost results store"):
        Store(path)
    with pytest.raises(StoreError):
        load_points(path)
    assert sha(path) == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["other.db"]  # no -wal/-shm left


def test_text_file_is_refused_and_untouched(tmp_path):
    path = tmp_path / "notes.sqlite"
    path.write_text("these are my notes, not a database\n" * 10)
    before = sha(path)
    with pytest.raises(StoreError, match="not an SQLite database"):
        Store(path)
    assert sha(path) == before


def test_corrupt_store_is_refused_and_untouched(tmp_path):
    path = tmp_path / "s.sqlite"
    with Store(path) as s:
        sid = s.open_study(SPEC, {}, resume=False)
        for n in range(1, 200):
            s.add_point(point(sid, 0, n, message="x" * 200))
    con = sqlite3.connect(path)
    con.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    con.close()
    data = bytearray(path.read_bytes())
    assert int.from_bytes(data[68:72], "big") == APPLICATION_ID
    page = int.from_bytes(data[16:18], "big")
    for i in range(2 * page, min(len(data), 6 * page)):  # scribble over pages 3-6
        data[i] = 0xA5
    path.write_bytes(bytes(data))
    before = sha(path)
    with pytest.raises(StoreError, match="corrupt"):
        Store(path)
    assert sha(path) == before


def test_missing_store_without_create(tmp_path):
    with pytest.raises(StoreError, match="no results store"):
        Store(tmp_path / "nope.sqlite", create=False)
    assert not (tmp_path / "nope.sqlite").exists()


def test_unknown_study_is_an_input_error(tmp_path):
    with Store(tmp_path / "s.sqlite") as s:
        s.open_study(SPEC, {}, resume=False)
        with pytest.raises(InputError, match="study"):
            s.load_study("nonesuch")


def test_load_points_and_csv_rows(tmp_path):
    path = tmp_path / "s.sqlite"
    with Store(path) as s:
        sid = s.open_study(SPEC, {}, resume=False)
        for n in (2, 4):
            s.add_point(point(sid, 0, n))
        s.add_point(point(sid, 1, 3, status="memory", work=None))
        rows = points_csv_rows(s.load_study(sid))
    frame = load_points(path)
    assert len(frame) == 3 and len(rows) == 3
    assert list(frame.columns[:len(POINT_COLUMNS)]) == list(POINT_COLUMNS)
    assert "profile_n_variables" in frame.columns
    assert set(frame["status"]) == {"ok", "memory"}
    assert (frame["study"] == "unit").all()
    # the points.csv contract of DESIGN.md
    for col in ("study", "family", "level", "method", "axis", "topology", "fixed", "size",
                "status", "seconds_median", "seconds_min", "seconds_max", "repeats", "work",
                "peak_bytes"):
        assert col in rows[0]
    assert len(load_points(path, study="unit")) == 3


def test_store_is_wal_and_integrity_checks(tmp_path):
    path = tmp_path / "s.sqlite"
    with Store(path) as s:
        sid = s.open_study(SPEC, {}, resume=False)
        s.add_point(point(sid, 0, 2))
        mode = s._con.execute("PRAGMA journal_mode").fetchone()[0]
    assert mode == "wal"
    con = sqlite3.connect(path)
    assert con.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
    con.close()
