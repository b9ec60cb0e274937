"""Index measurements by (run, suite, kernel): reports and comparisons look figures up by kernel."""

from alembic import op

revision = "0002"
down_revision = "0001"
branch_labels = None
depends_on = None


def upgrade() -> None:
    op.create_index("ix_measurements_run_suite_kernel", "measurements", ["run_id", "suite", "kernel"])
    op.drop_index("ix_measurements_run_suite", table_name="measurements")


def downgrade() -> None:
    op.create_index("ix_measurements_run_suite", "measurements", ["run_id", "suite"])
    op.drop_index("ix_measurements_run_suite_kernel", table_name="measurements")
