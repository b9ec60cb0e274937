"""The first schema: hosts, runs, measurements, placements."""

import sqlalchemy as sa
from alembic import op

revision = "0001"
down_revision = None
branch_labels = None
depends_on = None


def upgrade() -> None:
    tz = sa.DateTime(timezone=True)
    op.create_table(
        "hosts",
        sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
        sa.Column("host_key", sa.String(200), nullable=False, unique=True),
        sa.Column("hostname", sa.String(200), nullable=False),
        sa.Column("fingerprint", sa.String(64), nullable=False),
        sa.Column("facts", sa.JSON, nullable=False),
        sa.Column("first_seen", tz, nullable=False),
    )
    op.create_index("ix_hosts_hostname", "hosts", ["hostname"])
    op.create_table(
        "runs",
        sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
        sa.Column("uuid", sa.String(36), nullable=False, unique=True),
        sa.Column("host_id", sa.Integer, sa.ForeignKey("hosts.id"), nullable=False),
        sa.Column("kind", sa.String(16), nullable=False),
        sa.Column("started_at", tz, nullable=False),
        sa.Column("ended_at", tz, nullable=True),
        sa.Column("status", sa.String(16), nullable=False),
        sa.Column("eaves_version", sa.String(32), nullable=False),
        sa.Column("params", sa.JSON, nullable=False),
        sa.Column("facts", sa.JSON, nullable=False),
        sa.Column("tag", sa.String(100), nullable=True),
        sa.Column("note", sa.Text, nullable=True),
        sa.Column("git_describe", sa.String(200), nullable=True),
        sa.Column("ceilings_run_uuid", sa.String(36), nullable=True),
    )
    op.create_index("ix_runs_host_id", "runs", ["host_id"])
    op.create_index("ix_runs_tag", "runs", ["tag"])
    op.create_index("ix_runs_host_status_started", "runs", ["host_id", "status", "started_at"])
    op.create_table(
        "measurements",
        sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
        sa.Column("run_id", sa.Integer, sa.ForeignKey("runs.id", ondelete="CASCADE"), nullable=False),
        sa.Column("suite", sa.String(16), nullable=False),
        sa.Column("kernel", sa.String(64), nullable=False),
        sa.Column("variant", sa.String(64), nullable=True),
        sa.Column("dtype", sa.String(16), nullable=False),
        sa.Column("threads", sa.Integer, nullable=False),
        sa.Column("working_set_bytes", sa.BigInteger, nullable=True),
        sa.Column("cache_level", sa.String(8), nullable=True),
        sa.Column("stride_elems", sa.Integer, nullable=True),
        sa.Column("shape", sa.String(64), nullable=True),
        *(sa.Column(name, sa.Float, nullable=True) for name in
          ("bytes_per_s", "ops_per_s", "ns_per_load", "hz", "best", "q1", "q3", "cv")),
        sa.Column("samples", sa.JSON, nullable=False),
        sa.Column("repetitions", sa.Integer, nullable=False),
        sa.Column("min_seconds", sa.Float, nullable=False),
        sa.Column("extra", sa.JSON, nullable=False),
    )
    op.create_index("ix_measurements_run_id", "measurements", ["run_id"])
    op.create_index("ix_measurements_run_suite", "measurements", ["run_id", "suite"])
    op.create_table(
        "placements",
        sa.Column("id", sa.Integer, primary_key=True, autoincrement=True),
        sa.Column("run_id", sa.Integer, sa.ForeignKey("runs.id", ondelete="CASCADE"), nullable=False),
        sa.Column("layer", sa.String(200), nullable=False),
        sa.Column("kind", sa.String(32), nullable=False),
        sa.Column("dtype", sa.String(16), nullable=False),
        sa.Column("threads", sa.Integer, nullable=False),
        sa.Column("batch", sa.Integer, nullable=True),
        sa.Column("seconds", sa.Float, nullable=False),
        sa.Column("samples", sa.JSON, nullable=False),
        *(sa.Column(name, sa.Float, nullable=False) for name in
          ("flops", "bytes", "flops_per_byte", "flops_per_s", "bytes_per_s",
           "attainable_flops_per_s", "efficiency")),
        sa.Column("bound", sa.String(16), nullable=False),
        sa.Column("roof", sa.String(64), nullable=False),
        sa.Column("extra", sa.JSON, nullable=False),
    )
    op.create_index("ix_placements_run_id", "placements", ["run_id"])


def downgrade() -> None:
    for table in ("placements", "measurements", "runs", "hosts"):
        op.drop_table(table)
