"""The first logbook: airframes, runs, baselines and modes.

Revision ID: 0001
Revises:
"""

import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None


def upgrade():
    op.create_table(
        "airframes",
        sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
        sa.Column("name", sa.String(200), nullable=False, unique=True),
        sa.Column("created_at", sa.String(40), nullable=False),
    )
    op.create_table(
        "runs",
        sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
        sa.Column("airframe_id", sa.Integer, sa.ForeignKey("airframes.id", ondelete="CASCADE"), nullable=False,
                  index=True),
        sa.Column("source", sa.Text, nullable=False),
        sa.Column("source_sha256", sa.String(64), nullable=False),
        sa.Column("recorded_at", sa.String(40)),
        sa.Column("stored_at", sa.String(40), nullable=False),
        sa.Column("conditions", sa.Text, nullable=False, server_default="{}"),
        sa.Column("notes", sa.Text, nullable=False, server_default=""),
        sa.Column("analysis", sa.Text, nullable=False),
        sa.Column("arrays", sa.LargeBinary),
    )
    op.create_table(
        "baselines",
        sa.Column("airframe_id", sa.Integer, sa.ForeignKey("airframes.id", ondelete="CASCADE"), primary_key=True),
        sa.Column("run_id", sa.Integer, sa.ForeignKey("runs.id", ondelete="CASCADE"), nullable=False),
        sa.Column("set_at", sa.String(40), nullable=False),
    )
    op.create_table(
        "modes",
        sa.Column("run_id", sa.Integer, sa.ForeignKey("runs.id", ondelete="CASCADE"), nullable=False, index=True),
        sa.Column("freq_hz", sa.Float, nullable=False),
        sa.Column("damping_ratio", sa.Float),
        sa.Column("axis", sa.String(8), nullable=False),
        sa.Column("prominence_db", sa.Float, nullable=False),
    )


def downgrade():
    for t in ("modes", "baselines", "runs", "airframes"):
        op.drop_table(t)
