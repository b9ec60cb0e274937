"""Every string a run carries becomes Text (a GEMM label overflowed VARCHAR(64) on PostgreSQL); the
unsearched tag loses its index; the spool's quarantine of runs a store refused.

SQLite rebuilds each table (batch mode, data copied); the store runs this with foreign keys off, or
dropping `runs` would cascade into its measurements (schema.upgrade checks the keys before commit)."""

import sqlalchemy as sa
from alembic import op

revision = "0003"
down_revision = "0002"
branch_labels = None
depends_on = None

# table -> (column, its type in 0002, nullable)
WIDENED = {
    "hosts": (("host_key", 200, False), ("hostname", 200, False), ("fingerprint", 64, False)),
    "runs": (("kind", 16, False), ("status", 16, False), ("eaves_version", 32, False),
             ("tag", 100, True), ("git_describe", 200, True)),
    "measurements": (("suite", 16, False), ("kernel", 64, False), ("variant", 64, True),
                     ("dtype", 16, False), ("cache_level", 8, True), ("shape", 64, True)),
    "placements": (("layer", 200, False), ("kind", 32, False), ("dtype", 16, False),
                   ("bound", 16, False), ("roof", 64, False)),
}


def upgrade() -> None:
    op.drop_index("ix_runs_tag", table_name="runs")
    for table, columns in WIDENED.items():
        with op.batch_alter_table(table) as batch:
            for name, length, nullable in columns:
                batch.alter_column(name, type_=sa.Text(), existing_type=sa.String(length),
                                   existing_nullable=nullable)
    op.create_table(
        "quarantine",
        sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
        sa.Column("run_uuid", sa.String(36), sa.ForeignKey("runs.uuid", ondelete="CASCADE"),
                  nullable=False, unique=True),
        sa.Column("reason", sa.Text, nullable=False),
        sa.Column("refused_by", sa.Text, nullable=False),
        sa.Column("refused_at", sa.DateTime(timezone=True), nullable=False),
    )


def downgrade() -> None:
    op.drop_table("quarantine")
    for table, columns in WIDENED.items():
        with op.batch_alter_table(table) as batch:
            for name, length, nullable in columns:
                batch.alter_column(name, type_=sa.String(length), existing_type=sa.Text(),
                                   existing_nullable=nullable)
    op.create_index("ix_runs_tag", "runs", ["tag"])
