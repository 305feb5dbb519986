"""Alembic's environment for the logbook: always run on the connection the logbook opened
(``config.attributes["connection"]``), never from an ini file or a URL of its own."""

from alembic import context

from monitor.logbook.tables import metadata

connection = context.config.attributes["connection"]
context.configure(connection=connection, target_metadata=metadata, render_as_batch=True)
with context.begin_transaction():
    context.run_migrations()
