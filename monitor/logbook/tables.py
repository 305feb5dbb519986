"""The logbook's schema (SQLAlchemy Core), the same on SQLite and PostgreSQL.

``airframes``: one row per airframe (its name as the technician writes it). ``runs``: one sweep
(its source file, the file's SHA-256, when it was recorded and stored, the bench that stored it,
conditions and notes as JSON text, the analysis as JSON text, the arrays the comparison report
draws as a compressed ``.npz`` blob, and the verdict when it was checked against a baseline).
``baselines``: at most one run per airframe. Modes, bands, levels and imbalance are kept in the
analysis JSON (the shape :meth:`monitor.analysis.summary.RunSummary` reads) and, for queries from
other tools, the modes also in their own table ``modes``. Migrations live in ``migrations/``
(Alembic); the newest revision is :data:`HEAD`.
"""

from __future__ import annotations

import sqlalchemy as sa

HEAD = "0002"
metadata = sa.MetaData()

airframes = sa.Table(
    "airframes", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("name", sa.String(200), nullable=False, unique=True),
    sa.Column("created_at", sa.String(40), nullable=False),
)

runs = sa.Table(
    "runs", metadata,
    sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
    sa.Column("airframe_id", sa.Integer, sa.ForeignKey("airframes.id", ondelete="CASCADE"), nullable=False, index=True),
    sa.Column("source", sa.Text, nullable=False),
    sa.Column("source_sha256", sa.String(64), nullable=False),
    sa.Column("recorded_at", sa.String(40)),
    sa.Column("stored_at", sa.String(40), nullable=False),
    sa.Column("bench", sa.String(200), nullable=False, server_default=""),
    sa.Column("conditions", sa.Text, nullable=False, server_default="{}"),
    sa.Column("notes", sa.Text, nullable=False, server_default=""),
    sa.Column("analysis", sa.Text, nullable=False),
    sa.Column("arrays", sa.LargeBinary),
    sa.Column("verdict", sa.String(10)),
)

baselines = sa.Table(
    "baselines", metadata,
    sa.Column("airframe_id", sa.Integer, sa.ForeignKey("airframes.id", ondelete="CASCADE"), primary_key=True),
    sa.Column("run_id", sa.Integer, sa.ForeignKey("runs.id", ondelete="CASCADE"), nullable=False),
    sa.Column("set_at", sa.String(40), nullable=False),
)

modes = sa.Table(
    "modes", metadata,
    sa.Column("run_id", sa.Integer, sa.ForeignKey("runs.id", ondelete="CASCADE"), nullable=False, index=True),
    sa.Column("freq_hz", sa.Float, nullable=False),
    sa.Column("damping_ratio", sa.Float),
    sa.Column("axis", sa.String(8), nullable=False),
    sa.Column("prominence_db", sa.Float, nullable=False),
)
