"""Alembic environment: migrations run on a connection the store hands over, never from an ini file."""

from alembic import context

from eaves.models import Base

connection = context.config.attributes["connection"]
context.configure(connection=connection, target_metadata=Base.metadata,
                  render_as_batch=connection.dialect.name == "sqlite")
with context.begin_transaction():
    context.run_migrations()
