"""The logbook store: open (creating or migrating), add runs, set baselines, read them back.

Where it lives: ``--logbook PATH`` (an SQLite file), ``--logbook postgresql://user@host/db`` (a
shop's shared logbook), or by default ``logbook.sqlite`` in the user's data directory
(platformdirs: ``~/.local/share/spinrig`` on Linux). The database layer is SQLAlchemy Core and
the schema's migrations are Alembic's (``migrations/``), so SQLite and PostgreSQL share one schema
and one code path; the only dialect-specific statement is the upsert, which both dialects spell
``INSERT ... ON CONFLICT`` (each through its SQLAlchemy dialect's ``insert``).

Safety:

- Two benches writing at once: every SQLite transaction takes the write lock when it begins
  (``BEGIN IMMEDIATE``, the SQLite documentation's recipe for writers; WAL journal, 30 s busy
  timeout), so writers queue instead of failing half way; on PostgreSQL each write is one
  transaction, and the airframe row and the baseline are upserts, so two benches creating the
  same airframe or moving its baseline at once leave one airframe and one baseline.
- Migrations: an SQLite logbook older than this spinrig is copied first (SQLite's online backup,
  a consistent copy) to ``<file>.schema-<rev>.bak``, then migrated; a logbook from a newer
  spinrig is refused, untouched.
- A damaged SQLite file (not a database, or failing ``PRAGMA quick_check``) is refused with one
  line and never written to; a run whose stored analysis no longer reads is reported as such and
  every other run still reads.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import socket
import sqlite3
from contextlib import contextmanager
from pathlib import Path

import sqlalchemy as sa
from sqlalchemy import event
from sqlalchemy.dialects import postgresql as pg_dialect
from sqlalchemy.dialects import sqlite as sqlite_dialect

from ..analysis.summary import RunSummary
from . import tables as T
from .errors import LogbookError

MIGRATIONS = Path(__file__).resolve().parent / "migrations"
BUSY_TIMEOUT_S = 30.0


def default_path() -> Path:
    import platformdirs

    return Path(platformdirs.user_data_path("spinrig", appauthor=False)) / "logbook.sqlite"


def _now() -> str:
    return dt.datetime.now(dt.UTC).isoformat(timespec="seconds")


def file_sha256(path: str | Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as f:
        for chunk in iter(lambda: f.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def _describe(spec: str) -> str:
    """The logbook's name for messages, without a password."""
    if "://" in spec:
        try:
            return sa.engine.make_url(spec).render_as_string(hide_password=True)
        except Exception:  # noqa: BLE001 - a malformed URL is reported by the caller
            return spec.split("://", 1)[0] + "://..."
    return spec


def _short(exc: BaseException) -> str:
    text = str(getattr(exc, "orig", None) or exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


class Logbook:
    """One open logbook (see the module docstring). ``spec``: a path, a URL or None (default)."""

    def __init__(self, spec: str | Path | None = None):
        spec = str(spec) if spec is not None else str(default_path())
        self.name = _describe(spec)
        self.sqlite_path: Path | None = None
        if "://" in spec:
            try:
                url = sa.engine.make_url(spec)
            except sa.exc.ArgumentError:
                raise LogbookError(f"logbook {self.name}: not a database URL (postgresql://user@host/db)") from None
            if url.get_backend_name() != "postgresql":
                raise LogbookError(f"logbook {self.name}: only PostgreSQL URLs are supported (or a file path "
                                   "for SQLite)")
            if url.drivername == "postgresql":
                url = url.set(drivername="postgresql+psycopg")
            self.engine = sa.create_engine(url, pool_pre_ping=True)
        else:
            self.sqlite_path = Path(spec).expanduser()
            self._check_sqlite_file()
            self.sqlite_path.parent.mkdir(parents=True, exist_ok=True)
            self.engine = sa.create_engine(f"sqlite:///{self.sqlite_path}", connect_args={"timeout": BUSY_TIMEOUT_S})
            self._sqlite_events()
        try:
            self._migrate()
        except LogbookError:
            self.engine.dispose()
            raise
        except sa.exc.DBAPIError as exc:
            self.engine.dispose()
            raise LogbookError(f"logbook {self.name}: {_short(exc)}") from None

    # --- opening ---------------------------------------------------------------------------

    def _check_sqlite_file(self) -> None:
        """Refuse a damaged SQLite file before anything writes to it."""
        p = self.sqlite_path
        if not p.exists():
            return
        if p.is_dir():
            raise LogbookError(f"logbook {p}: is a directory, not an SQLite file")
        with open(p, "rb") as f:
            head = f.read(16)
        if head and head != b"SQLite format 3\x00":
            raise LogbookError(f"logbook {p}: not an SQLite database (byte 0 is not the SQLite header); "
                               "it was left as it is")
        if not head:
            return
        try:
            con = sqlite3.connect(f"file:{p}?mode=ro", uri=True, timeout=BUSY_TIMEOUT_S)
            try:
                rows = con.execute("PRAGMA quick_check").fetchall()
            finally:
                con.close()
        except sqlite3.DatabaseError as exc:
            raise LogbookError(f"logbook {p}: damaged ({exc}); it was left as it is: restore a backup "
                               "(*.bak beside it) or recover it with the sqlite3 shell's .recover") from None
        if rows != [("ok",)]:
            raise LogbookError(f"logbook {p}: damaged (quick_check: {rows[0][0]}); it was left as it is: restore a "
                               "backup (*.bak beside it) or recover it with the sqlite3 shell's .recover")

    def _sqlite_events(self) -> None:
        @event.listens_for(self.engine, "connect")
        def _on_connect(dbapi_con, _record):
            dbapi_con.isolation_level = None  # SQLAlchemy's recipe: we emit BEGIN ourselves
            cur = dbapi_con.cursor()
            cur.execute("PRAGMA journal_mode=WAL")
            cur.execute(f"PRAGMA busy_timeout={int(BUSY_TIMEOUT_S * 1000)}")
            cur.execute("PRAGMA foreign_keys=ON")
            cur.close()

        @event.listens_for(self.engine, "begin")
        def _on_begin(conn):
            conn.exec_driver_sql("BEGIN IMMEDIATE")

    def _alembic_config(self, connection):
        from alembic.config import Config

        cfg = Config()
        cfg.set_main_option("script_location", str(MIGRATIONS))
        cfg.attributes["connection"] = connection
        return cfg

    def revision(self) -> str | None:
        from alembic.migration import MigrationContext

        with self.engine.connect() as c:
            return MigrationContext.configure(c).get_current_revision()

    def _migrate(self) -> None:
        from alembic import command
        from alembic.script import ScriptDirectory

        with self.engine.connect() as c:
            if self.engine.dialect.name == "postgresql":  # one migrator at a time across benches
                c.exec_driver_sql("SELECT pg_advisory_lock(73425117)")
            try:
                from alembic.migration import MigrationContext

                current = MigrationContext.configure(c).get_current_revision()
                if current == T.HEAD:
                    return
                known = {s.revision for s in ScriptDirectory(str(MIGRATIONS)).walk_revisions()}
                if current is not None and current not in known:
                    raise LogbookError(f"logbook {self.name}: written by a newer spinrig (schema {current}; this one "
                                       f"knows up to {T.HEAD}); it was left as it is")
                if current is None and sa.inspect(c).has_table("runs"):
                    raise LogbookError(f"logbook {self.name}: has a runs table but no schema version: not a "
                                       "spinrig logbook; it was left as it is")
                if current is not None and self.sqlite_path is not None:
                    c.commit()
                    self.backup(self.sqlite_path.with_name(f"{self.sqlite_path.name}.schema-{current}.bak"))
                command.upgrade(self._alembic_config(c), "head")
                c.commit()
            finally:
                if self.engine.dialect.name == "postgresql":
                    c.exec_driver_sql("SELECT pg_advisory_unlock(73425117)")
                    c.commit()

    def backup(self, to: Path) -> Path:
        """A consistent copy of an SQLite logbook (SQLite's online backup API)."""
        src = sqlite3.connect(str(self.sqlite_path), timeout=BUSY_TIMEOUT_S)
        try:
            dst = sqlite3.connect(str(to))
            try:
                src.backup(dst)
            finally:
                dst.close()
        finally:
            src.close()
        return to

    def close(self) -> None:
        self.engine.dispose()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    @contextmanager
    def _tx(self):
        try:
            with self.engine.begin() as c:
                yield c
        except sa.exc.DBAPIError as exc:
            raise LogbookError(f"logbook {self.name}: {_short(exc)}") from None

    def _insert(self, table):
        d = pg_dialect if self.engine.dialect.name == "postgresql" else sqlite_dialect
        return d.insert(table)

    # --- writing ---------------------------------------------------------------------------

    def _airframe_id(self, c, name: str, create: bool) -> int | None:
        if create:
            c.execute(self._insert(T.airframes).values(name=name, created_at=_now())
                      .on_conflict_do_nothing(index_elements=["name"]))
        return c.execute(sa.select(T.airframes.c.id).where(T.airframes.c.name == name)).scalar()

    def add_run(self, airframe: str, summary: RunSummary, source: str, sha256: str, *, notes: str = "",
                recorded_at: str | None = None, verdict: str | None = None, baseline: bool = False) -> int:
        """Store one run of ``airframe`` (created when new); returns the run's number."""
        name = airframe.strip()
        if not name or "@" in name:
            raise LogbookError(f"airframe name {airframe!r}: must be non-empty and without '@'")
        a = summary.analysis
        with self._tx() as c:
            aid = self._airframe_id(c, name, create=True)
            rid = c.execute(T.runs.insert().values(
                airframe_id=aid, source=source, source_sha256=sha256, recorded_at=recorded_at, stored_at=_now(),
                bench=socket.gethostname(), conditions=json.dumps(a.get("conditions") or {}), notes=notes,
                analysis=json.dumps(a), arrays=summary.arrays_blob(), verdict=verdict)
                .returning(T.runs.c.id)).scalar_one()
            modes = [{"run_id": rid, "freq_hz": m["freq_hz"], "damping_ratio": m.get("damping_ratio"),
                      "axis": m["axis"], "prominence_db": m.get("prominence_db", 0.0)} for m in a.get("modes", [])]
            if modes:
                c.execute(T.modes.insert(), modes)
            if baseline:
                self._set_baseline(c, aid, rid)
        return int(rid)

    def _set_baseline(self, c, aid: int, rid: int) -> None:
        ins = self._insert(T.baselines).values(airframe_id=aid, run_id=rid, set_at=_now())
        c.execute(ins.on_conflict_do_update(index_elements=["airframe_id"],
                                            set_={"run_id": ins.excluded.run_id, "set_at": ins.excluded.set_at}))

    def set_baseline(self, airframe: str, run_id: int) -> None:
        with self._tx() as c:
            aid = self._airframe_id(c, airframe, create=False)
            if aid is None:
                raise LogbookError(f"logbook {self.name}: no airframe {airframe!r}")
            ok = c.execute(sa.select(T.runs.c.id).where((T.runs.c.id == run_id) & (T.runs.c.airframe_id == aid)))
            if ok.scalar() is None:
                raise LogbookError(f"logbook {self.name}: airframe {airframe!r} has no run {run_id}")
            self._set_baseline(c, aid, run_id)

    # --- reading ---------------------------------------------------------------------------

    def airframes(self) -> list[dict]:
        """Every airframe: name, runs, baseline run number (or None), when it was set, its source."""
        r, b, a = T.runs, T.baselines, T.airframes
        every = r.alias("every_run")
        count = sa.select(sa.func.count()).select_from(every).where(every.c.airframe_id == a.c.id) \
            .correlate(a).scalar_subquery()
        q = (sa.select(a.c.name, count.label("runs"), b.c.run_id, b.c.set_at, r.c.source, r.c.verdict)
             .select_from(a.outerjoin(b, b.c.airframe_id == a.c.id).outerjoin(r, r.c.id == b.c.run_id))
             .order_by(a.c.name))
        with self._tx() as c:
            return [dict(row._mapping) for row in c.execute(q)]

    def _known(self, c, airframe: str) -> tuple[int, int | None]:
        """(airframe id, its baseline run or None) of an airframe that must exist."""
        aid = self._airframe_id(c, airframe, create=False)
        if aid is None:
            raise LogbookError(f"logbook {self.name}: no airframe {airframe!r} (spinrig baseline list)")
        base = c.execute(sa.select(T.baselines.c.run_id).where(T.baselines.c.airframe_id == aid)).scalar()
        return aid, base

    def runs(self, airframe: str) -> list[dict]:
        """The runs of ``airframe``, oldest first, each with ``baseline`` True for its baseline."""
        r = T.runs
        with self._tx() as c:
            aid, base = self._known(c, airframe)
            rows = c.execute(sa.select(r.c.id, r.c.source, r.c.source_sha256, r.c.recorded_at, r.c.stored_at,
                                       r.c.bench, r.c.notes, r.c.verdict, r.c.analysis)
                             .where(r.c.airframe_id == aid).order_by(r.c.id)).all()
        out = []
        for row in rows:
            d = dict(row._mapping)
            text = d.pop("analysis")
            try:
                an = json.loads(text)
                d["modes"] = len(an.get("modes", []))
                d["readable"] = True
            except (ValueError, AttributeError):
                d["modes"] = None
                d["readable"] = False
            d["baseline"] = d["id"] == base
            out.append(d)
        return out

    def run(self, airframe: str, run_id: int | None = None) -> tuple[dict, RunSummary]:
        """(the run's row, its summary): the baseline when ``run_id`` is None."""
        r = T.runs
        with self._tx() as c:
            aid, base = self._known(c, airframe)
            if run_id is None:
                run_id = base
                if run_id is None:
                    raise LogbookError(f"logbook {self.name}: airframe {airframe!r} has no baseline "
                                       "(spinrig baseline save)")
            row = c.execute(sa.select(r).where((r.c.id == run_id) & (r.c.airframe_id == aid))).first()
        if row is None:
            raise LogbookError(f"logbook {self.name}: airframe {airframe!r} has no run {run_id} (spinrig runs "
                               f"{airframe})")
        d = dict(row._mapping)
        try:
            analysis = json.loads(d.pop("analysis"))
            if not isinstance(analysis, dict):
                raise ValueError("not an object")
            summary = RunSummary.from_parts(analysis, d.pop("arrays"))
        except Exception as exc:  # noqa: BLE001 - any damage to one stored run: say which, keep the rest
            raise LogbookError(f"logbook {self.name}: run {run_id} of {airframe!r}: its stored analysis does not "
                               f"read ({type(exc).__name__}); the other runs are unaffected") from None
        d["airframe"] = airframe
        d["baseline"] = run_id == base
        return d, summary
