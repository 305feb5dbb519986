"""The logbook on SQLite and on a real PostgreSQL server (tests/pg_server.py): runs and baselines
round trip, two benches writing at once, migration with a backup first, damaged files refused
with one line and left as they are, and the `baseline` / `runs` commands."""

from __future__ import annotations

import json
import multiprocessing as mp
import os
import shutil
import sqlite3

import numpy as np
import pytest

from monitor.analysis.summary import RunSummary
from monitor.logbook.errors import LogbookError
from monitor.logbook.store import Logbook
from tests.conftest import run_spinrig
from tests.pg_server import PgServer, fresh_database, pg_bin


@pytest.fixture(scope="session")
def pg_url():
    given = os.environ.get("SPINRIG_TEST_POSTGRES")
    if given:
        yield given
        return
    if not pg_bin("initdb"):
        if os.environ.get("CI"):
            pytest.fail("PostgreSQL (initdb) is missing: .ci/run installs it")
        pytest.skip("PostgreSQL's initdb is not installed (apt-get install postgresql)")
    server = PgServer()
    try:
        yield server.start()
    finally:
        server.stop()


@pytest.fixture(params=["sqlite", "postgresql"])
def book_spec(request, tmp_path):
    if request.param == "sqlite":
        return str(tmp_path / "book.sqlite")
    return fresh_database(request.getfixturevalue("pg_url"))


def summary(freqs=(120.0, 250.0), seed=0) -> RunSummary:
    rng = np.random.default_rng(seed)
    a = {"source": "x.spinrec", "blades": 3, "modes": [{"freq_hz": f, "damping_ratio": 0.03, "axis": "pitch",
                                                        "prominence_db": 15.0} for f in freqs],
         "bands": [], "levels": [], "imbalance": {"motors": []}, "conditions": {"props": "off"}}
    return RunSummary(a, np.linspace(0, 1000, 65), rng.normal(-30, 3, (65, 3)), rng.normal(0, 1, (65, 3)),
                      np.linspace(3000, 20000, 9), rng.normal(-30, 3, (9, 65, 3)).astype(np.float32))


def test_runs_and_baselines_round_trip(book_spec):
    s = summary()
    with Logbook(book_spec) as book:
        r1 = book.add_run("Brisling 5 #2", s, "/bench/a.spinrec", "ab" * 32, notes="stock", baseline=True)
        r2 = book.add_run("Brisling 5 #2", summary((118.0,)), "/bench/b.spinrec", "cd" * 32, verdict="fail")
        book.add_run("Pipit 3", s, "/bench/c.spinrec", "ef" * 32)
        row, got = book.run("Brisling 5 #2")
        assert row["id"] == r1 and row["baseline"] and row["notes"] == "stock"
        assert got.analysis == s.analysis
        np.testing.assert_allclose(got.mean_db, s.mean_db, rtol=1e-6)  # stored as float32
        np.testing.assert_allclose(got.map_db, s.map_db, atol=0.02)  # float16 dB: within 0.02 dB at -30 dB
        runs = book.runs("Brisling 5 #2")
        assert [(r["id"], r["baseline"], r["verdict"], r["modes"]) for r in runs] == \
            [(r1, True, None, 2), (r2, False, "fail", 1)]
        book.set_baseline("Brisling 5 #2", r2)
        assert book.run("Brisling 5 #2")[0]["id"] == r2
        listed = {a["name"]: (a["runs"], a["run_id"]) for a in book.airframes()}
        assert listed == {"Brisling 5 #2": (2, r2), "Pipit 3": (1, None)}
        with pytest.raises(LogbookError, match="'Pipit 3' has no baseline"):
            book.run("Pipit 3")
        with pytest.raises(LogbookError, match="no airframe 'Nope'"):
            book.runs("Nope")
        with pytest.raises(LogbookError, match="has no run 99"):
            book.set_baseline("Pipit 3", 99)
        with pytest.raises(LogbookError, match="without '@'"):
            book.add_run("a@b", s, "x", "0" * 64)


def _writer(spec: str, bench: int, n: int, q) -> None:
    try:
        with Logbook(spec) as book:
            ids = [book.add_run("Shared frame", summary(seed=bench), f"/bench{bench}/{i}.spinrec", "0" * 64,
                                baseline=True) for i in range(n)]
        q.put(("ok", ids))
    except Exception as exc:  # noqa: BLE001 - reported to the parent
        q.put(("error", repr(exc)))


def test_two_benches_writing_at_once_lose_nothing(book_spec):
    Logbook(book_spec).close()  # created (and migrated) once; the writers race on the rows
    ctx = mp.get_context("spawn")
    q = ctx.Queue()
    procs = [ctx.Process(target=_writer, args=(book_spec, b, 15, q)) for b in (1, 2)]
    for p in procs:
        p.start()
    got = [q.get(timeout=120) for _ in procs]
    for p in procs:
        p.join(timeout=60)
    assert all(kind == "ok" for kind, _ in got), got
    ids = sorted(i for _, v in got for i in v)
    assert len(set(ids)) == 30
    with Logbook(book_spec) as book:
        runs = book.runs("Shared frame")
        assert sorted(r["id"] for r in runs) == ids
        assert len([a for a in book.airframes() if a["name"] == "Shared frame"]) == 1
        assert sum(r["baseline"] for r in runs) == 1  # exactly one baseline, one of the runs written


def test_an_old_sqlite_logbook_is_backed_up_then_migrated(tmp_path):
    from alembic import command

    path = tmp_path / "old.sqlite"
    book = Logbook.__new__(Logbook)  # open at the first schema only, as an older spinrig left it
    import sqlalchemy as sa

    eng = sa.create_engine(f"sqlite:///{path}")
    with eng.connect() as c:
        command.upgrade(Logbook._alembic_config(book, c), "0001")
        c.commit()
        c.exec_driver_sql("INSERT INTO airframes (name, created_at) VALUES ('Old frame', '2026-01-01')")
        c.exec_driver_sql("INSERT INTO runs (airframe_id, source, source_sha256, stored_at, analysis) VALUES "
                          "(1, 'a.spinrec', 'x', '2026-01-01', '{\"modes\": []}')")
        c.commit()
    eng.dispose()
    with Logbook(path) as book:
        assert book.revision() == "0002"
        runs = book.runs("Old frame")
        assert [(r["source"], r["bench"], r["verdict"]) for r in runs] == [("a.spinrec", "", None)]
    backup = tmp_path / "old.sqlite.schema-0001.bak"
    con = sqlite3.connect(backup)
    assert con.execute("SELECT version_num FROM alembic_version").fetchall() == [("0001",)]
    assert con.execute("SELECT name FROM airframes").fetchall() == [("Old frame",)]
    con.close()


def test_a_logbook_from_a_newer_spinrig_is_refused_untouched(tmp_path):
    path = tmp_path / "new.sqlite"
    Logbook(path).close()
    con = sqlite3.connect(path)
    con.execute("UPDATE alembic_version SET version_num = '0099'")
    con.commit()
    con.close()
    before = path.read_bytes()
    with pytest.raises(LogbookError, match=r"newer spinrig \(schema 0099; this one knows up to 0002\)"):
        Logbook(path)
    assert path.read_bytes() == before


def test_a_file_that_is_not_a_database_is_refused_untouched(tmp_path):
    path = tmp_path / "notes.sqlite"
    path.write_bytes(b"shopping list: props, screws\n")
    with pytest.raises(LogbookError, match=r"not an SQLite database \(byte 0"):
        Logbook(path)
    assert path.read_bytes() == b"shopping list: props, screws\n"


def test_a_damaged_sqlite_logbook_is_refused_with_one_line_and_left_as_it_is(tmp_path):
    path = tmp_path / "book.sqlite"
    with Logbook(path) as book:
        for i in range(40):
            book.add_run("Frame", summary(seed=i), f"/r{i}", "0" * 64)
    con = sqlite3.connect(path)
    con.execute("PRAGMA wal_checkpoint(TRUNCATE)")
    con.close()
    data = bytearray(path.read_bytes())
    page = 4096
    for at in range(2 * page, min(len(data), 6 * page)):  # overwrite table pages (b-tree headers and all)
        data[at] = 0xA5
    path.write_bytes(bytes(data))
    with pytest.raises(LogbookError) as err:
        Logbook(path)
    assert "damaged" in str(err.value) and "\n" not in str(err.value) and str(path) in str(err.value)
    assert path.read_bytes() == bytes(data)


def test_one_run_whose_analysis_no_longer_reads_leaves_the_others_readable(tmp_path):
    path = tmp_path / "book.sqlite"
    with Logbook(path) as book:
        r1 = book.add_run("Frame", summary(), "/a", "0" * 64, baseline=True)
        r2 = book.add_run("Frame", summary(), "/b", "0" * 64)
    con = sqlite3.connect(path)
    con.execute("UPDATE runs SET analysis = '{not json' WHERE id = ?", (r2,))
    con.commit()
    con.close()
    with Logbook(path) as book:
        runs = book.runs("Frame")
        assert [(r["id"], r["readable"]) for r in runs] == [(r1, True), (r2, False)]
        assert book.run("Frame")[0]["id"] == r1
        with pytest.raises(LogbookError, match=rf"run {r2} of 'Frame': its stored analysis does not read"):
            book.run("Frame", r2)


def test_bad_logbook_urls_are_one_line_errors():
    with pytest.raises(LogbookError, match="only PostgreSQL URLs"):
        Logbook("mysql://u@h/db")
    with pytest.raises(LogbookError, match="logbook postgresql://spinrig@127.0.0.1:1/none"):
        Logbook("postgresql://spinrig@127.0.0.1:1/none")  # nothing listens on port 1



def test_the_default_logbook_lives_in_the_users_data_directory(tmp_path):
    env = {"HOME": str(tmp_path), "XDG_DATA_HOME": str(tmp_path / "data"), "SPINRIG_LOGBOOK": None}
    p = run_spinrig("baseline", "list", env=env, timeout=120)
    assert p.returncode == 0, p.stderr
    assert (tmp_path / "data" / "spinrig" / "logbook.sqlite").exists()
    assert "0 airframes" in p.stdout


def test_baseline_and_runs_commands_on_a_simulated_sweep(tmp_path, book_spec):
    from tests.sim_helpers import sweep_capture

    cap = tmp_path / "stock.spinrec"
    sweep_capture(cap, "pipit3", seed=1)
    env = {"SPINRIG_LOGBOOK": book_spec}
    p = run_spinrig("baseline", "save", "Pipit 3 #1", str(cap), "--blades", "2", "--note", "stock", env=env)
    assert p.returncode == 0, p.stderr
    assert "run 1 is the baseline now" in p.stdout
    p = run_spinrig("baseline", "show", "Pipit 3 #1", "--json", env=env)
    d = json.loads(p.stdout)
    assert d["run"] == 1 and d["notes"] == "stock" and d["analysis"]["modes"]
    assert {lv["by"] for lv in d["analysis"]["levels"]} == {"throttle"}
    p = run_spinrig("runs", "Pipit 3 #1", env=env)
    assert p.returncode == 0 and "baseline" in p.stdout and "stock.spinrec" in p.stdout
    p = run_spinrig("runs", "Nobody", env=env)
    assert p.returncode == 2 and p.stderr.count("\n") == 1 and "no airframe 'Nobody'" in p.stderr
    broken = tmp_path / "broken.sqlite"
    shutil.copy(__file__, broken)
    p = run_spinrig("baseline", "list", "--logbook", str(broken))
    assert p.returncode == 2 and p.stderr.count("\n") == 1 and "not an SQLite database" in p.stderr
