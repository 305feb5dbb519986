"""Which bench stored a run (a shop's shared logbook has several), and the verdict of a run that
was checked against its airframe's baseline.

Revision ID: 0002
Revises: 0001
"""

import sqlalchemy as sa
from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade():
    with op.batch_alter_table("runs") as batch:
        batch.add_column(sa.Column("bench", sa.String(200), nullable=False, server_default=""))
        batch.add_column(sa.Column("verdict", sa.String(10)))


def downgrade():
    with op.batch_alter_table("runs") as batch:
        batch.drop_column("verdict")
        batch.drop_column("bench")
