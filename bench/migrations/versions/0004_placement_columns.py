"""What every placement has becomes columns of `placements` (the roofs a layer was held against and
how close it came), moved out of its `extra` JSON; `working_set_bytes` and `headroom` are not stored
any more (they are `bytes` and 1 / `efficiency`), unless a row's value says otherwise.

The columns are added nullable, filled row by row from `extra`, then made NOT NULL where every
placement has a value: on SQLite that last step rebuilds `placements` (batch mode), which no table
references, and the store runs it with foreign keys off anyway (see 0003). A row whose `extra` lacks
a key every placement has cannot be given a value: the upgrade stops naming it, nothing changed."""

from __future__ import annotations

from typing import Any, Callable

import sqlalchemy as sa
from alembic import op

from eaves.errors import StoreError

revision = "0004"
down_revision = "0003"
branch_labels = None
depends_on = None

# column -> (type, nullable), in the order eaves.place wrote the keys into `extra`
COLUMNS = {
    "macs": (sa.Float, True),
    "where": (sa.Text, False),
    "memory_roof": (sa.Text, False),
    "memory_roof_bytes_per_s": (sa.Float, False),
    "memory_roof_kernel": (sa.Text, False),
    "compute_roof": (sa.Text, False),
    "compute_roof_ops_per_s": (sa.Float, False),
    "ridge_flops_per_byte": (sa.Float, False),
    "memory_efficiency": (sa.Float, False),
    "compute_efficiency": (sa.Float, False),
    "achievable_efficiency": (sa.Float, True),
    "consistent_level": (sa.Text, True),
    "threads_measured": (sa.Integer, False),
    "threads_match": (sa.Text, False),
    "memory_threads_measured": (sa.Integer, False),
}
# every key of a 0003 placement's `extra`, in the order eaves.place wrote them; two are recomputed on
# reading and not stored: working_set_bytes (= bytes) and headroom (= 1 / efficiency)
KEY_ORDER = ("macs", "where", "working_set_bytes", "memory_roof", "memory_roof_bytes_per_s",
             "memory_roof_kernel", "compute_roof", "compute_roof_ops_per_s", "ridge_flops_per_byte",
             "memory_efficiency", "compute_efficiency", "achievable_efficiency", "headroom",
             "consistent_level", "threads_measured", "threads_match", "memory_threads_measured")
BATCH = 1000  # rows updated per executemany

PLACEMENTS = sa.table("placements", sa.column("id", sa.Integer), sa.column("bytes", sa.Float),
                      sa.column("efficiency", sa.Float), sa.column("extra", sa.JSON),
                      *(sa.column(name, kind) for name, (kind, _) in COLUMNS.items()))


def _derived(bytes_: float, efficiency: float) -> dict[str, Any]:
    return {"working_set_bytes": bytes_, "headroom": 1.0 / efficiency if efficiency else None}


def _split(row: Any) -> dict[str, Any]:
    """One row's new column values and what stays in `extra`."""
    extra = dict(row.extra or {})
    missing = [name for name, (_, nullable) in COLUMNS.items() if not nullable and extra.get(name) is None]
    if missing:
        raise StoreError(f"placements row {row.id}: its extra has no {', '.join(missing)}, which every "
                         "placement has; the upgrade changed nothing")
    values = {name: extra.pop(name, None) for name in COLUMNS}
    for name, value in _derived(row.bytes, row.efficiency).items():
        if name in extra and extra[name] == value:  # the same as recomputed: not stored twice
            del extra[name]
    return {"_id": row.id, **values, "extra": extra}


def _rewrite(convert: Callable[[Any], dict[str, Any]]) -> None:
    """Every placement row updated with `convert(row)` (its keys: "_id" and the columns to set)."""
    conn = op.get_bind()
    update = PLACEMENTS.update().where(PLACEMENTS.c.id == sa.bindparam("_id"))
    rows = conn.execute(sa.select(PLACEMENTS).order_by(PLACEMENTS.c.id)).all()
    for start in range(0, len(rows), BATCH):
        conn.execute(update, [convert(r) for r in rows[start:start + BATCH]])


def upgrade() -> None:
    for name, (kind, _) in COLUMNS.items():
        op.add_column("placements", sa.Column(name, kind(), nullable=True))
    _rewrite(_split)
    with op.batch_alter_table("placements") as batch:
        for name, (kind, nullable) in COLUMNS.items():
            if not nullable:
                batch.alter_column(name, existing_type=kind(), nullable=False)


def _join(row: Any) -> dict[str, Any]:
    """One row's `extra` as 0003 kept it: every key back, in the order eaves.place wrote them."""
    detail = {name: getattr(row, name) for name in COLUMNS}
    derived = _derived(row.bytes, row.efficiency)
    rest = dict(row.extra or {})
    ordered = {name: rest.pop(name) if name in rest else detail.get(name, derived.get(name)) for name in KEY_ORDER}
    return {"_id": row.id, "extra": {**ordered, **rest}}


def downgrade() -> None:
    _rewrite(_join)
    with op.batch_alter_table("placements") as batch:
        for name in COLUMNS:
            batch.drop_column(name)
